/* unitlens comparison page: the units of one layer pair, A and B side by side, most changed first.
   Data: data/pair-<layer>.js (window.UNITLENS_PAIR). Rows are built in chunks as the page is
   scrolled, so a layer of thousands of units opens at once; #unit-<id> scrolls to a unit's row.
   Every string from the data goes in through textContent; nothing is parsed as markup. */
(function () {
  "use strict";
  const D = window.UNITLENS_PAIR, P = window.ULPlot, fmt = P.fmt;
  const rowsBox = document.getElementById("rows");
  const SIZE = 64, CHUNK = 40;
  const have = new Set(D.thumbs.have);
  const mined = { a: new Set(D.sides.a.mined || []), b: new Set(D.sides.b.mined || []) };

  const el = P.el, add = P.add;
  const pct = x => (x === null || x === undefined) ? "–" : Math.round(100 * x) + "%";
  const signed = x => (x === null || x === undefined) ? "–" : (x > 0 ? "+" : "") + fmt(x);

  changeHistogram();
  if (!rowsBox) { done(); return; }

  /* ---- one exemplar: a crop from the side's sprite sheet, a whole-image thumbnail, or a gap */
  function exemplar(k, u, item, r) {
    const img = item[0], col = item[1], shared = item[2], S = D.sides[k].sheets, p = u["pos_" + k];
    const id = D.ids[String(img)] || "image " + img;
    const fig = el("figure", "ex" + (shared ? " shared" : ""));
    let what;
    if (col >= 0 && S && p !== null) {
      const sheet = Math.floor(p / S.rows), rowsHere = Math.min(S.rows, S.units - sheet * S.rows), f = SIZE / S.thumb;
      const c = add(fig, "span", "crop");
      c.style.width = c.style.height = SIZE + "px";
      c.style.backgroundImage = 'url("' + S.dir + "/" + S.names[sheet] + '")';
      c.style.backgroundSize = (S.cols * S.thumb * f) + "px " + (rowsHere * S.thumb * f) + "px";
      c.style.backgroundPosition = (-col * SIZE) + "px " + (-(p % S.rows) * SIZE) + "px";
      what = "receptive-field crop";
    } else if (have.has(img)) {
      const t = add(fig, "img", "thumb");
      t.loading = "lazy"; t.decoding = "async"; t.width = t.height = SIZE; t.alt = id;
      t.src = D.thumbs.dir + "/" + img + ".jpg";
      if (S) add(fig, "span", "badge-t", "thumb");  // marked only beside crops
      what = "whole image (no crop)";
    } else {
      add(fig, "span", "gap", "–");
      what = "no picture (thumbnail limit reached, or the file could not be read)";
    }
    fig.title = "#" + (r + 1) + " " + id + "\n" + what + (shared ? "\nalso in the other side's top set" : "");
    return fig;
  }

  function side(k, u) {
    const s = el("div", "u-side " + k);
    const tagLine = add(s, "div", "u-side-head");
    add(tagLine, "span", "side-tag " + k, k.toUpperCase());
    const dead = u["dead_" + k];
    add(tagLine, "span", "u-side-nums", "mean " + fmt(u["mean_" + k]) + " · fires " + pct(u["fire_rate_" + k]));
    if (dead) add(tagLine, "span", "flag dead", "dead");
    const href = D.sides[k].href;
    if (href && mined[k].has(u.unit)) {
      const a = add(tagLine, "a", "u-link", "unit view");
      a.href = href + "#unit-" + u.unit;
    }
    const strip = add(s, "div", "u-strip" + (dead ? " tied" : ""));
    if (dead) strip.title = "constant on the corpus: these images tie, and are listed in corpus order";
    const syn = u["syn_" + k];
    if (syn) {
      const f = add(strip, "figure", "ex synth");
      const im = add(f, "img", "synthimg");
      im.loading = "lazy"; im.decoding = "async"; im.width = im.height = SIZE;
      im.alt = "synthesised image, " + k.toUpperCase() + ", unit " + u.unit;
      im.src = D.sides[k].img_dir + "/" + syn.src;
      add(f, "span", "badge-s", "synth");
      f.title = "synthesised for unit " + u.unit + " in " + k.toUpperCase() + (syn.ratio !== null && syn.ratio !== undefined ? "\n×" + fmt(syn.ratio) + " of the best natural exemplar" : "");
    }
    const list = u["ex_" + k];
    list.forEach((item, r) => strip.appendChild(exemplar(k, u, item, r)));
    if (!list.length && !syn) add(strip, "span", "note", "no exemplars");
    if (dead && list.length) add(s, "p", "note", "constant on the corpus: every image ties, so these are just the first in corpus order");
    return s;
  }

  function row(u) {
    const r = el("article", "urow" + (u.dead ? " is-dead" : ""));
    r.id = "u-" + u.unit;
    r.dataset.unit = String(u.unit);
    const h = add(r, "div", "u-head");
    add(h, "span", "u-rank", "#" + u.rank);
    add(h, "span", "u-id", "unit " + u.unit);
    const m = add(h, "span", "u-change");
    const bar = add(m, "span", "meter");
    add(bar, "span", "fill").style.width = (100 * u.change).toFixed(1) + "%";
    add(m, "span", "num", "change " + u.change.toFixed(2));
    if (u.changed) add(h, "span", "flag changed", "changed").title = "correlation significantly below the stated level, or dead on one side only";
    if (u.dead_a && u.dead_b) add(h, "span", "flag dead", "dead in A and B");
    else if (u.dead_a) add(h, "span", "flag dead", "dead in A");
    else if (u.dead_b) add(h, "span", "flag dead", "dead in B");
    const n = add(r, "div", "u-nums");
    const item = (label, value, cls) => { const s = add(n, "span", "kv " + (cls || "")); add(s, "span", "k", label); add(s, "b", "v", value); return s; };
    item("corr", fmt(u.corr, 3) + (u.corr_ci ? " [" + fmt(u.corr_ci[0], 3) + ", " + fmt(u.corr_ci[1], 3) + "]" : ""), "n-corr");
    item("top-set overlap", fmt(u.jaccard, 2), "n-jaccard");
    if (u.best_match === null) item("best match in B", "none (dead)");
    else {
      const s = item("best match in B", "unit " + u.best_match + " (r " + fmt(u.best_match_corr, 3) + ")", u.best_match !== u.unit ? "moved" : "");
      if (D.sides.b.href && mined.b.has(u.best_match)) {
        const a = add(s, "a", "u-link", "view");
        a.href = D.sides.b.href + "#unit-" + u.best_match;
      }
    }
    item("mean change", signed(u.mean_change));
    item("firing-rate change", signed(u.fire_rate_change));
    const sides = add(r, "div", "u-sides");
    sides.appendChild(side("a", u));
    sides.appendChild(side("b", u));
    return r;
  }

  /* ---- order, filter, chunked drawing */
  const ORDER = { rank: 1, unit: 1, corr: 1, jaccard: 1, best_match_corr: 1, mean_change: -1, fire_rate_change: -1 };
  const SHOW = {
    all: () => true, changed: u => u.changed === undefined ? u.change > 0 : u.changed, dead: u => u.dead,
    moved: u => u.best_match !== null && u.best_match !== u.unit,
  };
  const sortSel = document.getElementById("sort"), dirBtn = document.getElementById("dir");
  const showSel = document.getElementById("show"), filterIn = document.getElementById("filter");
  const countOut = document.getElementById("count");
  const state = { sort: "rank", reverse: false, show: "all", ids: null };
  let order = [], drawn = 0;
  const sentinel = el("div", "more");

  function relayout() {
    const key = state.sort, sign = ORDER[key] * (state.reverse ? -1 : 1), keep = SHOW[state.show];
    order = D.units.filter(u => keep(u) && (!state.ids || state.ids(u.unit)));
    order.sort((x, y) => {
      const a = x[key], b = y[key], an = a === null || a === undefined, bn = b === null || b === undefined;
      if (an || bn) return an && bn ? x.rank - y.rank : an ? 1 : -1;  // no value: last
      return (a - b) * sign || x.rank - y.rank;
    });
    rowsBox.replaceChildren();
    drawn = 0;
    countOut.textContent = order.length === D.units.length ? order.length + " units" : order.length + " of " + D.units.length + " units";
    more(CHUNK);
  }
  function more(n) {
    const frag = document.createDocumentFragment();
    const end = Math.min(order.length, drawn + n);
    for (; drawn < end; drawn++) frag.appendChild(row(order[drawn]));
    rowsBox.appendChild(frag);
    if (drawn < order.length) rowsBox.appendChild(sentinel); else sentinel.remove();
    // an observer reports changes only: a sentinel still in reach after drawing asks again
    if (sentinel.isConnected) requestAnimationFrame(() => {
      if (sentinel.isConnected && sentinel.getBoundingClientRect().top < innerHeight + 900) more(CHUNK);
    });
  }
  if ("IntersectionObserver" in window) {
    new IntersectionObserver(es => { if (es.some(e => e.isIntersecting)) more(CHUNK); }, { rootMargin: "900px" }).observe(sentinel);
  }

  sortSel.addEventListener("change", () => { state.sort = sortSel.value; relayout(); });
  dirBtn.addEventListener("click", () => {
    state.reverse = !state.reverse;
    dirBtn.setAttribute("aria-pressed", String(state.reverse));
    relayout();
  });
  showSel.addEventListener("change", () => { state.show = showSel.value; relayout(); });
  filterIn.addEventListener("input", () => {
    const f = P.unitFilter(filterIn.value);
    filterIn.setAttribute("aria-invalid", String(f === undefined));
    if (f === undefined) return;
    state.ids = f;
    relayout();
  });
  // choices with nothing to show stay listed but disabled, so the control says what is missing
  Object.keys(SHOW).forEach(k => {
    const opt = showSel.querySelector('option[value="' + k + '"]');
    if (k !== "all" && !D.units.some(SHOW[k])) { opt.disabled = true; opt.textContent += " (none)"; }
  });

  function route() {
    const m = /^#unit-(\d+)$/.exec(location.hash);
    if (!m) return;
    const unit = +m[1];
    let k = order.findIndex(u => u.unit === unit);
    if (k < 0 && D.units.some(u => u.unit === unit)) {  // outside the filter: show everything again
      state.show = showSel.value = "all"; state.ids = null; filterIn.value = "";
      relayout();
      k = order.findIndex(u => u.unit === unit);
    }
    if (k < 0) return;
    if (k >= drawn) more(k + 1 - drawn + CHUNK);
    const r = document.getElementById("u-" + unit);
    rowsBox.querySelectorAll(".urow.target").forEach(x => x.classList.remove("target"));
    r.classList.add("target");
    r.scrollIntoView({ block: "start" });
  }
  window.addEventListener("hashchange", route);

  relayout();
  route();
  done();

  function changeHistogram() {
    const box = document.getElementById("change-hist");
    if (!box || !D.units.length) return;
    const bins = 20, counts = new Array(bins).fill(0);
    D.units.forEach(u => { counts[Math.min(bins - 1, Math.floor(u.change * bins))]++; });
    box.dataset.plot = "change";
    box.appendChild(P.histogram({ counts: counts, lo: 0, hi: 1, width: 330, height: 130,
      xlabel: "change (0: same, 1: unrelated)", ylabel: "units", title: "how much each unit changed" }));
  }
  function done() { document.documentElement.dataset.ready = performance.now().toFixed(1); }
})();
