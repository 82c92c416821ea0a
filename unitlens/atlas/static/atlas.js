/* unitlens layer page: a virtual grid of unit cards (only the cards near the viewport exist in
   the document, so a layer of thousands of units opens at once), sorting and filtering, and the
   unit view at #unit-<channel> with keyboard stepping.
   Data: data/<layer>.cards.js (window.UNITLENS_CARDS) at once, data/<layer>.units.js
   (window.UNITLENS_UNITS) when a unit is first opened. Every string from the data goes in
   through textContent; nothing is parsed as markup. */
(function () {
  "use strict";
  const C = window.UNITLENS_CARDS, P = window.ULPlot;
  const N = C.units.length;
  const grid = document.getElementById("grid"), view = document.getElementById("unit");
  const toolbar = document.querySelector(".toolbar"), head = document.querySelector(".pagehead");
  const sortSel = document.getElementById("sort"), dirBtn = document.getElementById("dir");
  const filterIn = document.getElementById("filter"), countOut = document.getElementById("count");
  const byUnit = new Map(C.units.map((u, i) => [u, i]));
  const fmt = P.fmt;
  const HERO = 88, SMALL = 40, STRIP = 12, WHOLE_SHOW = 320, CARD_MIN_W = 248, CARD_H = 214, GAP = 12, BUFFER = 2;  // BUFFER: rows drawn beyond the viewport
  const SPARK = "0123456789ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz-_";

  const el = P.el, add = P.add;
  const pct = x => (x === null || x === undefined) ? "–" : (100 * x).toFixed(x < 0.1 && x > 0 ? 1 : 0) + "%";
  const imgSrc = name => C.img_dir + "/" + name;

  /* ---- crops from the sprite sheets (background-position; a sheet loads when a crop is drawn) */
  const S = C.sheets;
  function crop(i, col, size) {
    const e = el("span", "crop");
    e.style.width = e.style.height = size + "px";
    const p = C.pos ? C.pos[i] : null;
    const name = (S && p !== null && p !== undefined) ? S.names[Math.floor(p / S.rows)] : null;
    if (!name) { e.classList.add("nocrop"); return e; }
    const sheet = Math.floor(p / S.rows), row = p % S.rows;
    const rowsHere = Math.min(S.rows, S.units - sheet * S.rows), k = size / S.thumb;
    e.style.backgroundImage = 'url("' + S.dir + "/" + name + '")';
    e.style.backgroundSize = (S.cols * S.thumb * k) + "px " + (rowsHere * S.thumb * k) + "px";
    e.style.backgroundPosition = (-col * size) + "px " + (-row * size) + "px";
    return e;
  }
  /* the receptive field outlined on a crop: `ring` is its box as fractions of the cell (data.py) */
  function ringed(e, ring) {
    if (!ring || e.classList.contains("nocrop")) return e;
    const r = add(e, "span", "ring");
    r.style.left = (100 * ring[0]) + "%"; r.style.top = (100 * ring[1]) + "%";
    r.style.width = (100 * (ring[2] - ring[0])) + "%"; r.style.height = (100 * (ring[3] - ring[1])) + "%";
    return e;
  }
  function synthImg(name, size, alt) {
    const im = el("img", "synthimg");
    im.loading = "lazy"; im.decoding = "async"; im.width = size; im.height = size; im.alt = alt;
    im.src = imgSrc(name);
    return im;
  }

  const FIRE_TIP = C.fire_at === null || C.fire_at === undefined ? "share of images on which the unit's maximum is above 0"
    : "share of images on which the unit's maximum reaches " + fmt(C.fire_at) + ", the layer's " + Math.round(100 * C.fire_q) +
      "th percentile of per-image maxima over all its units";
  /* a number on a card: a visible label and a tooltip saying what it is */
  function num(parent, cls, label, value, tip) {
    const s = add(parent, "span", "num-l " + cls);
    if (label) add(s, "span", "lab", label);
    add(s, "span", "val", String(value));
    s.title = tip;
    return s;
  }

  /* ---- one card (built on first sight, kept for reuse) */
  const built = new Array(N);
  function card(i) {
    if (built[i]) return built[i];
    const u = C.units[i], src = C.synth_src[i], filled = C.filled ? C.filled[i] : 0;
    const a = el("a", "card");
    a.href = "#unit-" + u;
    a.dataset.unit = String(u);
    a.setAttribute("aria-label", "unit " + u);
    const top = add(a, "div", "card-head");
    num(top, "uid", "", u, "unit (channel) " + u + " of " + C.layer);
    if (C.mined && C.peak[i] !== null) num(top, "peak n-peak", "peak", fmt(C.peak[i]), "peak: the largest activation of this unit anywhere in the corpus");
    if (C.concept && C.concept[i] !== null) {  // what `unitlens label` named it after
      const chip = add(top, "span", "chip concept-chip");
      add(chip, "span", "", C.concept[i]);
      add(chip, "b", "", fmt(C.iou[i], 2));
      chip.title = "detects \u201c" + C.concept[i] + "\u201d: IoU " + fmt(C.iou[i], 3) + " between where it fires (its top " +
        "0.5% of activations) and the annotated masks, over the annotated images";
    }
    const imgs = add(a, "div", "card-imgs" + (C.mined ? "" : " synth-only"));
    let first = 0;
    if (src) {
      const f = add(imgs, "span", "hero synth");
      f.appendChild(synthImg(src, HERO, "synthesised image for unit " + u));
      add(f, "span", "badge", "synth");
      const doubts = C.doubts ? C.doubts[i] : null;
      if (doubts && doubts.length) {  // a visible mark; the tooltip says why
        const d = add(f, "span", "doubt" + (doubts.indexOf("did not converge") >= 0 ? " unconverged" : ""),
          doubts.indexOf("did not converge") >= 0 ? "not converged" : doubts.length === 1 ? "1 doubt" : doubts.length + " doubts");
        d.title = "Mind: " + doubts.join("; ");
        a.classList.add("doubtful");
      }
    } else if (filled > 0) {
      add(imgs, "span", "hero").appendChild(ringed(crop(i, 0, HERO), C.ring ? C.ring[i] : null));
      first = 1;
    } else add(imgs, "span", "hero empty", "no images yet");
    if (C.mined && filled > first) {  // only exemplars that exist get a box
      const quad = add(imgs, "span", "quad");
      for (let r = first; r < Math.min(filled, first + STRIP); r++) quad.appendChild(crop(i, r, SMALL));
    }
    const sp = C.spark ? C.spark[i] : "";
    if (sp) {
      const counts = Array.from(sp, ch => SPARK.indexOf(ch));
      a.appendChild(P.histogram({ counts: counts, lo: 0, hi: 1, width: 214, height: 26, spark: true,
        marks: [{ x: C.spark_mean[i], cls: "mean" }], title: "distribution of the per-image maximum (dashed: mean)" }));
    } else add(a, "div", "spark-empty", C.mined ? "" : "not mined");
    const nums = add(a, "div", "card-nums");
    if (C.mined && C.fire[i] !== null) num(nums, "n-fire", "fires", pct(C.fire[i]), FIRE_TIP);
    if (C.mined && C.csi[i] !== null) num(nums, "n-csi", "class sel.", fmt(C.csi[i], 2),
      "class selectivity: 0 when every class drives the unit alike, 1 when only one does");
    if (C.ratio[i] !== null) num(nums, "n-ratio", "synth/nat", "×" + fmt(C.ratio[i], 2),
      "the synthesised image's spatial maximum over the best natural exemplar's");
    if (C.trust && C.trust[i] !== null) num(nums, "n-trust", "trust", pct(C.trust[i]),
      "share of the synthesis checks its image passes: converged (not judged for an image stopped at parity on purpose, " +
      "or shorter than two early-stop windows), reaches the best natural exemplar, rank 1 on its own image, robust to small warps");
    const par = C.parity ? C.parity[i] : null;
    if (par !== null && par !== undefined) num(nums, "n-parity" + (par < 1 ? " warn" : ""), "parity",
      par >= 1 ? "reached" : pct(par),
      "share of the unit's synthesised images whose objective, under fresh random warps, reaches its best natural exemplar's");
    built[i] = a;
    return a;
  }

  /* ---- order, filter, and the virtual grid */
  const KEYS = { id: C.units, peak: C.peak, csi: C.csi, fire: C.fire, ratio: C.ratio, trust: C.trust, own_rank: C.own_rank, robust: C.robust,
    feeders: C.feeders, iou: C.iou, concept: C.concept_rank };
  const state = { sort: "id", desc: false, filter: null, trust: "all", concept: "" };
  const byConcept = i => !state.concept || (state.concept === "\u0000none" ? !C.concept[i] : C.concept[i] === state.concept);
  const TRUST = {  // the synthesis filter: what a unit's first synthesised image must show
    all: () => true,
    trusted: i => !!C.synth_src[i] && !!C.doubts && C.doubts[i] !== null && C.doubts[i].length === 0,
    doubtful: i => !!C.doubts && !!C.doubts[i] && C.doubts[i].length > 0,
    unconverged: i => !!C.doubts && !!C.doubts[i] && C.doubts[i].indexOf("did not converge") >= 0,
  };
  let order = [], cols = 1, cardW = CARD_MIN_W, mounted = new Set(), firstFrame = false;

  const parseFilter = P.unitFilter;

  function computeOrder() {
    const key = KEYS[state.sort] || C.units, sign = state.desc ? -1 : 1, idx = [];
    for (let i = 0; i < N; i++) if ((!state.filter || state.filter(C.units[i])) && TRUST[state.trust](i) && byConcept(i)) idx.push(i);
    idx.sort((a, b) => {
      const x = key[a], y = key[b];
      const xn = x === null || x === undefined, yn = y === null || y === undefined;
      if (xn || yn) return xn && yn ? C.units[a] - C.units[b] : xn ? 1 : -1;  // missing values last
      return (x - y) * sign || C.units[a] - C.units[b];
    });
    return idx;
  }

  function measure() {
    const w = grid.clientWidth || CARD_MIN_W;
    cols = Math.max(1, Math.floor((w + GAP) / (CARD_MIN_W + GAP)));
    cardW = (w - GAP * (cols - 1)) / cols;
    const rows = Math.ceil(order.length / cols);
    grid.style.height = Math.max(0, rows * (CARD_H + GAP) - GAP) + "px";
  }

  /* mount the cards of the rows in (or `extra` rows near) the viewport, unmount the rest */
  function paint(extra) {
    if (grid.hidden) return;
    const more = extra === undefined ? BUFFER : extra;
    const top = grid.getBoundingClientRect().top, rowH = CARD_H + GAP;
    const r0 = Math.max(0, Math.floor(-top / rowH) - more);
    const r1 = Math.floor((window.innerHeight - top) / rowH) + more;
    const want = new Set();
    for (let k = r0 * cols; k < Math.min(order.length, (r1 + 1) * cols); k++) want.add(order[k]);
    mounted.forEach(i => { if (!want.has(i)) { built[i].remove(); } });
    const frag = document.createDocumentFragment();
    for (let k = r0 * cols; k < Math.min(order.length, (r1 + 1) * cols); k++) {
      const i = order[k], a = card(i);
      a.style.left = ((k % cols) * (cardW + GAP)) + "px";
      a.style.top = (Math.floor(k / cols) * rowH) + "px";
      a.style.width = cardW + "px";
      if (!mounted.has(i) || a.parentNode !== grid) frag.appendChild(a);
    }
    grid.appendChild(frag);
    mounted = want;
  }
  let queued = false;
  function schedule() { if (!queued) { queued = true; requestAnimationFrame(() => { queued = false; paint(); }); } }

  function layout() {
    order = computeOrder();
    grid.dataset.sort = state.sort;
    countOut.textContent = order.length === N ? N + " units" : order.length + " of " + N + " units";
    measure();
    paint(firstFrame ? 0 : BUFFER);
  }

  function setSort(key, desc) {
    state.sort = key; state.desc = desc;
    sortSel.value = key;
    dirBtn.setAttribute("aria-pressed", String(desc));
    dirBtn.textContent = desc ? "↓ high first" : "↑ low first";
    layout();
  }
  sortSel.addEventListener("change", () => setSort(sortSel.value, sortSel.value !== "id"));
  dirBtn.addEventListener("click", () => setSort(state.sort, !state.desc));
  filterIn.addEventListener("input", () => {
    const f = parseFilter(filterIn.value);
    filterIn.setAttribute("aria-invalid", String(f === undefined));
    if (f === undefined) return;
    state.filter = f;
    layout();
  });
  // orders without data stay listed but disabled, so the control says what is missing
  if (C.synthesised) {  // the synthesis filter, on layers that have synthesised images
    const lab = el("label", "ctl");
    lab.append("synthesis ");
    const sel = add(lab, "select");
    sel.id = "trust";
    [["all", "all units"], ["trusted", "passes every check"], ["doubtful", "with doubts"], ["unconverged", "not converged"]]
      .forEach(([v, t]) => { const o = add(sel, "option", "", t); o.value = v; });
    sel.addEventListener("change", () => { state.trust = sel.value; layout(); });
    dirBtn.after(lab);
  }
  if (C.concept) {  // the concept filter and the layer's summary, on layers `unitlens label` has named
    const lab = el("label", "ctl");
    lab.append("concept ");
    const sel = add(lab, "select");
    sel.id = "concept";
    const names = [...new Set(C.concept.filter(c => c !== null))].sort();
    [["", "all units"], ...names.map(c => [c, c]), ["\u0000none", "no concept"]]
      .forEach(([v, t]) => { const o = add(sel, "option", "", t); o.value = v; });
    sel.addEventListener("change", () => { state.concept = sel.value; layout(); });
    dirBtn.after(lab);
    const S = C.concept_summary, box = el("details", "concept-summary");
    box.open = true;
    add(box, "summary", "", S.labelled + " of " + S.units + " units detect a concept (IoU \u2265 " + S.cutoff + "), " +
      S.concepts + " distinct");
    const shares = Object.entries(S.share);
    if (shares.length) {
      const p = add(box, "div", "plotbox");
      p.dataset.plot = "concepts";
      p.appendChild(P.hbars({ labels: shares.map(e => e[0]), values: shares.map(e => e[1]), highlight: 0, width: 420,
        title: "share of the layer's units per concept" }));
    }
    toolbar.before(box);
  }
  [["csi", C.csi], ["peak", C.peak], ["fire", C.fire], ["ratio", C.ratio], ["trust", C.trust], ["own_rank", C.own_rank], ["robust", C.robust],
    ["feeders", C.feeders], ["iou", C.iou], ["concept", C.concept_rank]].forEach(([k, v]) => {
    const opt = sortSel.querySelector('option[value="' + k + '"]');
    if (!v || !v.some(x => x !== null && x !== undefined)) { opt.disabled = true; opt.textContent += " (none)"; }
  });
  window.addEventListener("scroll", schedule, { passive: true });
  window.addEventListener("resize", () => { measure(); schedule(); });

  /* ---- the unit view */
  let details = window.UNITLENS_UNITS || null, waiting = [], loading = false, savedScroll = 0, current = null, last = null;

  function withDetails(cb) {
    if (details) return cb(details);
    waiting.push(cb);
    if (loading) return;
    loading = true;
    const s = document.createElement("script");
    s.src = document.body.dataset.details;
    s.onload = () => { details = window.UNITLENS_UNITS; waiting.splice(0).forEach(f => f(details)); };
    s.onerror = () => { loading = false; waiting.splice(0).forEach(f => f(null)); };
    document.body.appendChild(s);
  }

  function section(parent, title, cls) {
    const s = add(parent, "section", "uv-sec " + (cls || ""));
    add(s, "h2", "", title);
    return s;
  }
  function facts(parent, rows, cls) {
    const dl = add(parent, "dl", "facts " + (cls || ""));
    rows.forEach(([k, v, w]) => { if (v === null || v === undefined) return; add(dl, "dt", "", k); add(dl, "dd", "num " + (w || ""), v); });
    return dl;
  }

  function neighbour(i, step) {
    // step through the cards as ordered now; a unit outside the filter steps by id
    const list = order.indexOf(i) >= 0 ? order : C.units.map((u, k) => k);
    const j = list.indexOf(i) + step;
    return j >= 0 && j < list.length ? list[j] : null;
  }
  function go(i) { if (i !== null) location.replace("#unit-" + C.units[i]); }

  function openUnit(u) {
    const i = byUnit.get(u);
    if (view.hidden) savedScroll = window.scrollY;
    grid.hidden = true; toolbar.hidden = true; head.classList.add("compact");
    view.hidden = false;
    closeWhole();
    view.replaceChildren();
    view.dataset.unit = String(u);
    delete view.dataset.complete;
    if (i === undefined) {
      add(view, "p", "missing", "Unit " + u + " is not in this layer. ");
      add(view, "a", "", "Back to all units").href = "#";
      return;
    }
    current = last = i;
    document.title = "unit " + u + " · " + C.layer;
    const bar = add(view, "div", "uv-bar");
    add(bar, "a", "uv-back", "all units").href = "#";
    const t = add(bar, "h2", "uv-title");
    add(t, "span", "uv-unit", "unit " + u);
    add(t, "span", "uv-layer", C.layer);
    const steps = add(bar, "span", "uv-steps");
    const prev = neighbour(i, -1), next = neighbour(i, 1);
    [["‹ previous", prev, "previous unit (← or k)"], ["next ›", next, "next unit (→ or j)"]].forEach(([label, to, title]) => {
      const b = add(steps, "button", "uv-step", label);
      b.type = "button"; b.disabled = to === null; b.title = title;
      b.addEventListener("click", () => go(to));
    });
    const k = order.indexOf(i);
    add(bar, "span", "uv-where", k >= 0 ? (k + 1) + " of " + order.length + ", by " + sortSel.selectedOptions[0].textContent.replace(" (none)", "") : "");

    const body = add(view, "div", "uv-body");
    const left = add(body, "div", "uv-col uv-left"), right = add(body, "div", "uv-col uv-right");
    const prof = section(left, "At a glance", "uv-profile");
    const heroes = add(prof, "div", "uv-heroes");
    const hs = Math.max(96, Math.min(176, Math.floor((view.clientWidth - 100) / 2)));  // two side by side, even on a phone
    if (C.synth_src[i]) {
      const f = add(heroes, "figure", "synth");
      f.appendChild(synthImg(C.synth_src[i], hs, "synthesised image for unit " + u));
      add(f, "figcaption", "", C.synth_n[i] > 1 ? "synthesised (1 of " + C.synth_n[i] + ")" : "synthesised");
    }
    if (C.mined && C.filled[i] > 0) {
      const f = add(heroes, "figure", "natural");
      f.appendChild(ringed(crop(i, 0, hs), C.ring ? C.ring[i] : null));
      add(f, "figcaption", "", "strongest natural crop");
    }
    if (!C.mined) add(prof, "p", "note", "This layer has not been mined yet: no exemplars or statistics.");
    const secs = [];
    const want = (cond, parent, title, cls) => { const s = cond ? section(parent, title, cls) : null; if (s) { secs.push(s); add(s, "p", "loading", "loading…"); } return s; };
    const dist = want(C.mined, left, "Per-image maximum over the corpus", "uv-dist");
    const conSec = want(!!(C.concept && C.iou[i] !== null), right, "What it detects, from your annotations", "uv-concepts");
    const exSec = want(C.mined, right, "Images that drive it most", "uv-ex");
    const facSec = want(C.mined, right, "Facets: groups among its top images", "uv-facets");
    const negSec = want(C.mined && C.negative, right, "Images that push it lowest (spatial minimum)", "uv-neg");
    const labSec = want(C.mined, right, "By label", "uv-labels");
    const synSec = want(!!C.synth_src[i], right, "Synthesised images: how they were made, how far to trust them", "uv-synth");
    const inSec = want(!!C.feeders && C.feeders[i] !== null && C.feeders[i] !== undefined, left, "Fed by: the earlier units that drive it", "uv-fedby");
    const outSec = want(!!C.feeds_later, left, "Feeds: the later units it drives", "uv-feeds");
    add(view, "p", "uv-caution", "Exemplars and synthesised images are evidence about this unit, not proof of what it means. " +
      "Keys: ← → (or k j) previous / next unit, Esc back to all units.");
    view.focus({ preventScroll: true });
    window.scrollTo(0, 0);

    withDetails(D => {
      if (current !== i || view.hidden) return;
      secs.forEach(s => s.querySelectorAll(".loading").forEach(n => n.remove()));
      if (!D) { add(right, "p", "missing", "The details of this layer (" + document.body.dataset.details + ") could not be read."); return; }
      const sd = D.synth ? D.synth[i] : null;
      if (C.mined) profile(prof, i, D);
      if (dist) histogram(dist, i, D, sd);
      if (conSec) concepts(conSec, i, D);
      if (exSec) exemplars(exSec, i, D, D.top, 0);
      if (exSec && D.dedupe) add(exSec, "p", "note", "Near-duplicate images count once here (cosine ≥ " + D.dedupe + " between small thumbnails); the best-scoring one is shown.");
      if (facSec) facets(facSec, i, D);
      if (negSec) exemplars(negSec, i, D, D.bottom, C.k);
      if (labSec) labels(labSec, i, D);
      if (synSec) synthesis(synSec, i, sd);
      if (inSec) fedBy(inSec, i, D);
      if (outSec) feedsInto(outSec, i, D);
      view.dataset.complete = "1";
    });
  }

  function profile(sec, i, D) {
    facts(sec, [
      ["images seen", C.images.toLocaleString()],
      ["peak (largest per-image max)", fmt(C.peak[i], 4)],
      ["per-image max, mean ± std", fmt(D.mean_max[i]) + " ± " + fmt(D.std_max[i])],
      ["mean activation", fmt(D.mean_mean[i])],
      [C.fire_at === null || C.fire_at === undefined ? "fires (max > 0) on" : "fires (max ≥ " + fmt(C.fire_at) + ") on", pct(C.fire[i])],
      ["lowest value anywhere", fmt(D.low[i])],
      ["class selectivity", C.csi[i] === null ? null : fmt(C.csi[i], 3)],
      ["synthesised / natural", C.ratio[i] !== null ? "×" + fmt(C.ratio[i], 3) : null],
    ]);
  }

  function histogram(sec, i, D, sd) {
    if (!D.hist[i] || !D.hist[i].length) { add(sec, "p", "note", "no histogram in the index"); return; }
    const marks = [{ x: D.mean_max[i], label: "mean", cls: "mean" }];
    if (sd && sd.images.length) {
      const best = Math.max(...sd.images.map(im => im.max_activation === null ? -Infinity : im.max_activation));
      if (isFinite(best)) marks.push({ x: best, label: "synth " + fmt(best), cls: "synth" });
    }
    const box = add(sec, "div", "plotbox");
    box.dataset.plot = "histogram";
    box.appendChild(P.histogram({ counts: D.hist[i], lo: D.hist_lo[i], hi: D.hist_hi[i], width: 380, height: 170, marks: marks,
      xlabel: "largest activation in the image", ylabel: "images", title: "histogram of the per-image maximum of unit " + C.units[i] }));
    add(sec, "p", "note", D.hist[i].length + " equal bins from " + fmt(D.hist_lo[i]) + " to " + fmt(D.hist_hi[i]) +
      ", re-binned from the run's fixed asinh bins (counts spread evenly within a source bin)." +
      (marks.length > 1 ? " Blue: the synthesised image's spatial maximum." : ""));
  }

  function exemplars(sec, i, D, lists, col0) {
    const list = lists ? lists[i] : null;
    if (!list || !list.length) { add(sec, "p", "note", "none"); return; }
    if (C.context) add(sec, "p", "note ctx-note", "Each crop shows at least " + C.context + " × " + C.context +
      " original pixels (the whole side of a smaller image) around the receptive field, which is outlined. " +
      (D.whole && col0 === 0 ? "Click a crop for the whole image with its box." : ""));
    const g = add(sec, "div", "ex-grid");
    const size = 96;  // crops of any thumbnail size show at one readable size
    list.forEach(([f, score, rank, box, viewBox, ring]) => {
      const fig = add(g, "figure", "ex");
      fig.dataset.rank = String(rank + 1);
      if (box) fig.dataset.field = box.join(" ");
      if (viewBox) fig.dataset.view = viewBox.join(" ");
      const c = fig.appendChild(ringed(crop(i, col0 + rank, size), ring));
      if (col0 === 0) outline(c, i, D, rank, size);
      const cell = D.whole && col0 === 0 && box ? D.whole.cell[f] : -1;
      if (cell >= 0 && D.whole.sizes[cell]) {  // the whole original, with the box, on click
        c.classList.add("opens"); c.tabIndex = 0; c.setAttribute("role", "button");
        c.title = "show the whole image";
        const open = () => wholeImage(D, f, cell, rank, box, viewBox);
        c.addEventListener("click", open);
        c.addEventListener("keydown", e => { if (e.key === "Enter" || e.key === " ") { e.preventDefault(); open(); } });
      }
      const cap = add(fig, "figcaption");
      const line = add(cap, "span", "ex-line");
      add(line, "span", "ex-rank", "#" + (rank + 1));
      add(line, "span", "ex-score", fmt(score, 4));
      const file = add(cap, "span", "ex-file", D.files[f]);
      file.title = D.files[f] + (box ? "\nreceptive field x " + box[0] + "–" + box[2] + ", y " + box[1] + "–" + box[3] + " (original pixels)" : "\nno crop could be cut");
      if (D.labels && D.labels[f] !== null) add(cap, "span", "ex-label", D.labels[f]);
    });
  }

  /* one exemplar's whole original (the letterboxed cell of a whole-image sheet), its field outlined and
     the part the crop shows dashed; closed by its button, Esc or a click beside it */
  let whole = null;
  function closeWhole() { if (whole) { whole.remove(); whole = null; } }
  function wholeImage(D, f, cell, rank, box, viewBox) {
    closeWhole();
    const W = D.whole, [cx, cy, cw, ch, ow, oh] = W.sizes[cell], k = WHOLE_SHOW / W.thumb;
    const per = W.cols * W.rows, n = cell % per;
    whole = add(view, "div", "whole-view");
    whole.addEventListener("click", e => { if (e.target === whole) closeWhole(); });
    const panel = add(whole, "figure", "whole-panel");
    panel.setAttribute("role", "dialog"); panel.setAttribute("aria-label", "whole image of exemplar " + (rank + 1));
    const pic = add(panel, "span", "whole-pic");
    pic.style.width = pic.style.height = WHOLE_SHOW + "px";
    pic.style.backgroundImage = 'url("' + imgSrc(W.names[Math.floor(cell / per)]) + '")';
    pic.style.backgroundSize = (W.cols * W.thumb * k) + "px auto";
    pic.style.backgroundPosition = (-(n % W.cols) * WHOLE_SHOW) + "px " + (-Math.floor(n / W.cols) * WHOLE_SHOW) + "px";
    const mark = (b, cls) => {  // a box in original pixels, placed on the letterboxed picture
      const m = add(pic, "span", cls);
      m.style.left = (k * (cx + b[0] * cw / ow)) + "px"; m.style.top = (k * (cy + b[1] * ch / oh)) + "px";
      m.style.width = (k * (b[2] - b[0]) * cw / ow) + "px"; m.style.height = (k * (b[3] - b[1]) * ch / oh) + "px";
    };
    if (viewBox) mark(viewBox, "whole-crop");
    mark(box, "whole-field");
    const cap = add(panel, "figcaption");
    add(cap, "span", "ex-file", "#" + (rank + 1) + " " + D.files[f]);
    add(cap, "span", "note", "receptive field x " + box[0] + "–" + box[2] + ", y " + box[1] + "–" + box[3] + " of " + ow + " × " + oh +
      " original pixels" + (viewBox ? "; dashed: what the crop shows" : ""));
    const b = add(cap, "button", "whole-close", "close");
    b.type = "button";
    b.addEventListener("click", closeWhole);
    b.focus({ preventScroll: true });
  }

  function concepts(sec, i, D) {
    const list = D.concepts ? D.concepts[i] : null;
    if (!list) { add(sec, "p", "note", "none"); return; }
    add(sec, "p", "note", (C.concept[i] ? "Labelled \u201c" + C.concept[i] + "\u201d" : "No concept reaches the cut-off") +
      ": intersection over union between where the unit fires (above its top-0.5% threshold, the map brought to the image's " +
      "pixels) and each concept's masks, summed over the annotated images; a label needs IoU \u2265 " + D.concept_cutoff +
      ". Its top exemplars below show the concept's mask outlined.");
    const box = add(sec, "div", "plotbox");
    box.dataset.plot = "concepts";
    box.appendChild(P.hbars({ labels: list.map(c => c[0] + " (" + c[2] + " images)"), values: list.map(c => c[1]), highlight: 0,
      width: 400, title: "IoU per concept of unit " + C.units[i] }));
  }

  /* the concept's mask over a top exemplar's crop: the crop box is fitted and centred in the cell */
  function outline(cropEl, i, D, rank, size) {
    const o = D.outlines ? D.outlines[i] : null;
    const path = o ? o.paths[rank] : null;
    if (!path) return;
    const [w, h] = o.boxes[rank], k = size / Math.max(w, h, 1);
    const svg = P.node("svg", { class: "outline", viewBox: "0 0 " + o.grid + " " + o.grid, preserveAspectRatio: "none",
      width: (w * k).toFixed(1), height: (h * k).toFixed(1) });
    svg.style.left = ((size - w * k) / 2).toFixed(1) + "px";
    svg.style.top = ((size - h * k) / 2).toFixed(1) + "px";
    P.node("path", { d: path }, svg);
    cropEl.appendChild(svg);
    cropEl.title = "outlined: the annotated \u201c" + o.concept + "\u201d";
  }

  function labels(sec, i, D) {
    if (!D.classes || !D.class_mean || !D.class_mean[i]) { add(sec, "p", "note", "The corpus has no labels."); return; }
    const means = D.class_mean[i];
    let best = 0;
    means.forEach((v, k) => { if (v !== null && (means[best] === null || v > means[best])) best = k; });
    add(sec, "p", "note", "Mean activation per class (spatial mean over each image). " + (C.csi[i] === null
      ? "No class selectivity: the index is defined for non-negative activations only, and this layer goes negative."
      : "Class selectivity " + fmt(C.csi[i], 3) + ": 0 when every class drives the unit alike, 1 when only one does."));
    const box = add(sec, "div", "plotbox");
    box.dataset.plot = "classes";
    box.appendChild(P.hbars({ labels: D.classes, values: means, highlight: best, width: 400, title: "class means of unit " + C.units[i] }));
    const tally = new Map();
    (D.top[i] || []).forEach(([f]) => { const l = D.labels ? D.labels[f] : null; if (l !== null) tally.set(l, (tally.get(l) || 0) + 1); });
    if (tally.size) {
      const p = add(sec, "p", "tally");
      add(p, "span", "", "Labels of the top " + D.top[i].length + " exemplars: ");
      [...tally.entries()].sort((a, b) => b[1] - a[1]).forEach(([l, c]) => {
        const chip = add(p, "span", "chip");
        add(chip, "span", "", l);
        add(chip, "b", "", c);
      });
    }
  }

  /* facets (facets.npz): k-means groups of the top images, shown over the kept crops */
  function facets(sec, i, D) {
    const f = D.facets ? D.facets[i] : null;
    if (!f) { add(sec, "p", "note", "This run has no facets for this layer (they need the per-image values mining keeps)."); return; }
    const letter = c => String.fromCharCode(65 + c);
    const about = f.cosine === undefined || f.cosine === null ? ""
      : f.distinct ? " Their centres have cosine " + fmt(f.cosine, 3) + " in the embedding (below " + D.facet_cosine + "): the unit may respond to different things."
      : " Their centres have cosine " + fmt(f.cosine, 3) + " in the embedding (" + D.facet_cosine + " or more): variations of one thing rather than different things.";
    add(sec, "p", "note", f.k > 1
      ? f.k + " groups among the top " + f.n + " images (k-means in the layer's embedding, silhouette " + fmt(f.silhouette, 3) + ")." + about
      : "One group: the top " + f.n + " images split into no facets of at least 3 images with silhouette ≥ 0.25.");
    if (f.k < 2) return;  // the one group is the exemplar list above
    const kept = (D.top[i] || []).length;
    for (let c = 0; c < f.k; c++) {
      const box = add(sec, "div", "facet");
      box.dataset.facet = letter(c);
      const ranks = [];
      f.ranks.forEach((fc, r) => { if (fc === c && r < kept) ranks.push(r); });
      add(box, "h4", "facet-head", "facet " + letter(c) + " · " + f.sizes[c] + " of " + f.n + " images" +
        " · " + ranks.length + " of the " + kept + " kept crops");
      const g = add(box, "div", "facet-grid");
      ranks.forEach(r => {
        const e = g.appendChild(crop(i, r, 64));
        e.title = "#" + (r + 1) + " " + D.files[D.top[i][r][0]];
      });
      const cells = f.thumbs ? f.thumbs[c] : [];
      if (!ranks.length && cells && cells.length && D.facet_sheet) {  // no kept crop: the members' whole images
        const sh = D.facet_sheet;
        cells.forEach(n => {
          const e = add(g, "span", "crop whole");
          e.style.width = e.style.height = "64px";
          e.style.backgroundImage = 'url("' + imgSrc(sh.src) + '")';
          e.style.backgroundSize = (sh.cols * 64) + "px auto";
          e.style.backgroundPosition = (-(n % sh.cols) * 64) + "px " + (-Math.floor(n / sh.cols) * 64) + "px";
          e.title = "whole image (no crop kept for this member)";
        });
      } else if (!ranks.length) add(g, "span", "note", "none among the kept crops");
    }
  }

  function nearest(parent, near, m, list) {
    const box = add(parent, "div", "syn-near");
    add(box, "span", "syn-near-head", "nearest natural images (" + (near.space || "cosine in the layer's embedding") + ")");
    const g = add(box, "div", "syn-near-grid");
    list.forEach(([id, sim], c) => {
      const fig = add(g, "figure", "near");
      const e = add(fig, "span", "crop");
      const k = 56 / near.thumb;
      e.style.width = e.style.height = "56px";
      e.style.backgroundImage = 'url("' + imgSrc(near.src) + '")';
      e.style.backgroundSize = (near.cols * near.thumb * k) + "px auto";
      e.style.backgroundPosition = (-c * 56) + "px " + (-m * 56) + "px";
      e.title = id;
      add(fig, "figcaption", "", fmt(sim, 3));
    });
  }

  function synthesis(sec, i, rec) {
    if (!rec) { add(sec, "p", "note", "none yet"); return; }
    const g = add(sec, "div", "syn-grid");
    rec.images.forEach((im, m) => {
      const fig = add(g, "figure", "syn");
      fig.appendChild(synthImg(im.src, 128, "synthesised image " + (m + 1) + " for unit " + C.units[i]));
      const rows = [];
      if (im.ratio !== null) rows.push(["vs best natural", "×" + fmt(im.ratio, 3), im.ratio < 1 ? "warn" : ""]);
      if (im.parity) {
        const p = im.parity;
        rows.push(["parity with best exemplar", (p.reached ? "reached" : "not reached") + " (" + fmt(p.synthesised) + " vs " + fmt(p.exemplar) + ")",
          p.reached ? "" : "warn"]);
        rows.push(["first at parity", p.step === null ? "never seen in the loop" : "step " + p.step]);
      }
      rows.push(["spatial max", fmt(im.max_activation, 4)]);
      rows.push(["reduced value on saved image", fmt(im.activation, 4)]);
      if (im.rank) rows.push(["rank among " + (im.channels || "?") + " channels", String(im.rank), im.rank > 1 ? "warn" : ""]);
      if (im.robustness) {
        const r = im.robustness;
        rows.push(["under " + r.n + " random warps", fmt(r.mean) + " ± " + fmt(r.std) + (r.relative !== null ? " (" + pct(r.relative) + ")" : ""),
          r.relative !== null && r.relative < 0.5 ? "warn" : ""]);
      }
      rows.push(["steps", String(im.steps)]);
      if (im.converged !== null && im.converged !== undefined)
        rows.push(["converged", im.converged ? "yes" : "no: still rising at the end", im.converged ? "" : "warn"]);
      else if (im.stopped_at_parity) rows.push(["converged", "not judged: stopped on purpose once past the natural best"]);
      if (im.parity_step !== null && im.parity_step !== undefined) rows.push(["reached the natural best at step", String(im.parity_step)]);
      const cap = add(fig, "figcaption");
      facts(cap, rows, "small");
      if (rec.near && im.nearest && im.nearest.length) nearest(cap, rec.near, m, im.nearest);
    });
    const notes = [];
    if (rec.images.some(im => im.rank > 1)) notes.push("a rank above 1 means other channels of the layer respond more strongly to that image " +
      "(in raw values, which differ in scale between channels: even a unit's best natural exemplar often drives other channels more)");
    if (rec.images.some(im => im.robustness && im.robustness.relative !== null && im.robustness.relative < 0.5)) notes.push("an image that loses most of its effect under small warps works only as it stands");
    if (rec.images.some(im => im.ratio !== null && im.ratio < 1)) notes.push("below ×1 the image excites the unit less than the best natural exemplar");
    if (rec.images.some(im => im.parity && !im.parity.reached)) notes.push("below parity the image, under random warps, drives the unit's objective less than its best natural exemplar does");
    if (notes.length) add(sec, "p", "note warn", "Mind: " + notes.join("; ") + ".");
    if (rec.trace && rec.trace.some(t => t.step.length)) {
      const box = add(sec, "div", "plotbox");
      box.dataset.plot = "trace";
      box.appendChild(P.lines({ series: rec.trace.map((t, m) => ({ x: t.step, y: t.value, name: "image " + (m + 1) })),
        width: 400, height: 170, xlabel: "optimisation step", ylabel: "goal score (under that step's warp)", title: "goal score per step" }));
    }
  }

  /* links (links.py): strips of units, each a link to its own unit view on its layer's page */
  function linkStrip(parent, title, items, weight) {
    if (!items.length) return;
    const row = add(parent, "div", "link-row");
    add(row, "h4", "link-head", title);
    const strip = add(row, "div", "link-strip");
    items.forEach(([u, c, share, href, pic, w]) => {
      const a = add(strip, href ? "a" : "span", "link-unit " + (c >= 0 ? "up" : "down"));
      if (href) a.href = href;
      a.dataset.unit = String(u);
      if (pic && pic[0] === "img") {
        const im = el("img", "synthimg");
        im.loading = "lazy"; im.width = im.height = 64; im.alt = "unit " + u; im.src = pic[1];
        a.appendChild(im);
      } else if (pic && pic[0] === "crop") {
        const e = add(a, "span", "crop");
        e.style.width = e.style.height = "64px";
        e.style.backgroundImage = 'url("' + pic[1] + '")';
        e.style.backgroundSize = (pic[3] * 64) + "px " + (pic[2] * 64) + "px";
        e.style.backgroundPosition = "0px " + (-pic[4] * 64) + "px";
      } else add(a, "span", "crop nocrop");
      add(a, "span", "link-id", "unit " + u);
      add(a, "span", "link-val", (c >= 0 ? "+" : "") + fmt(c) + " · " + (share >= 0 ? "+" : "") + Math.round(100 * share) + "%");
      if (w !== null && w !== undefined && weight) add(a, "span", "link-w", weight + " " + fmt(w, 3));
      a.title = "unit " + u + ": contribution " + fmt(c, 4) + ", " + Math.round(100 * share) + "% of its inputs' absolute sum" +
        (href ? "; open its unit view" : "; its layer has no page in this atlas");
    });
  }
  function fedBy(sec, i, D) {
    const groups = D.feeders ? D.feeders[i] : null;
    if (!groups) { add(sec, "p", "note", "No links measured into this unit (`unitlens link`)."); return; }
    groups.forEach(g => {
      add(sec, "p", "note", "From " + g.layer + ": " + g.method + " at the activations of " + g.layer + " (" + g.baseline +
        " baseline" + (g.steps ? ", " + g.steps + " steps" : "") + "), mean over " + g.exemplars + " exemplars; " +
        "effective feeders " + fmt(g.effective, 3) + "; the unit's mean change " + fmt(g.change) +
        (g.gap !== null ? ", contributions add up to it within " + (100 * g.gap).toFixed(1) + "%" : "") + "." +
        (g.stale ? " Stale: this layer was mined again since; measure again with `unitlens link ... --force`." : ""));
      linkStrip(sec, "drive it up", g.up, g.weight);
      linkStrip(sec, "hold it down", g.down, g.weight);
    });
  }
  function feedsInto(sec, i, D) {
    const groups = D.feeds ? D.feeds[i] : null;
    if (!groups) { add(sec, "p", "note", "No links measured out of this unit's layer into a later one."); return; }
    groups.forEach(g => linkStrip(sec, "in " + g.layer + " (share of each unit's inputs, " + g.method + ")", g.units, null));
  }

  function closeUnit() {
    closeWhole();
    if (view.hidden) return;
    view.hidden = true; view.replaceChildren(); current = null;
    grid.hidden = false; toolbar.hidden = false; head.classList.remove("compact");
    document.title = document.title.replace(/^unit .* · /, "");
    measure();
    window.scrollTo(0, savedScroll);
    paint();
    if (last !== null && built[last] && built[last].isConnected) built[last].focus({ preventScroll: true });
  }

  function route() {
    const m = /^#unit-(-?\d+)$/.exec(location.hash);
    if (m) openUnit(+m[1]); else closeUnit();
  }
  window.addEventListener("hashchange", route);

  document.addEventListener("keydown", e => {
    const t = e.target, typing = t && (t.tagName === "INPUT" || t.tagName === "SELECT" || t.tagName === "TEXTAREA");
    if (e.altKey || e.ctrlKey || e.metaKey) return;
    if (typing) { if (e.key === "Escape") t.blur(); return; }
    if (whole && e.key === "Escape") { e.preventDefault(); closeWhole(); return; }
    if (!view.hidden) {
      if (current !== null && (e.key === "ArrowRight" || e.key === "j")) { e.preventDefault(); go(neighbour(current, 1)); }
      else if (current !== null && (e.key === "ArrowLeft" || e.key === "k")) { e.preventDefault(); go(neighbour(current, -1)); }
      else if (e.key === "Escape") { e.preventDefault(); location.hash = ""; }
    } else if (e.key === "/") { e.preventDefault(); filterIn.focus(); }
  });

  // the first frame draws only what is on screen; the rows around it follow right after
  firstFrame = true;
  setSort("id", false);
  firstFrame = false;
  setTimeout(() => paint(), 0);
  route();
  document.documentElement.dataset.ready = performance.now().toFixed(1);
})();
