/* unitlens plots: a tiny inline-SVG renderer (histograms, horizontal bars, line traces), and the
   few DOM helpers the page scripts share (el, add, unitFilter).
   Elements are built with createElementNS and text goes in through textContent only, so no
   value can become markup. Colours come from CSS classes (see atlas.css), so plots follow the
   light and dark themes. */
(function () {
  "use strict";
  // the namespace of the page's own inline <svg> mark (no address needs spelling out here)
  const NS = document.querySelector("svg").namespaceURI;

  function node(tag, attrs, parent) {
    const e = document.createElementNS(NS, tag);
    for (const k in attrs) e.setAttribute(k, attrs[k]);
    if (parent) parent.appendChild(e);
    return e;
  }

  function label(parent, x, y, text, cls, anchor) {
    const t = node("text", { x: x, y: y, class: cls || "tick", "text-anchor": anchor || "middle" }, parent);
    t.textContent = text;
    return t;
  }

  function tip(parent, text) {
    node("title", {}, parent).textContent = text;
  }

  /* a number for people: 3 significant digits, exponent only when far from 1 */
  function fmt(x, digits) {
    if (x === null || x === undefined || !isFinite(x)) return "–";
    const d = digits || 3, a = Math.abs(x);
    if (a !== 0 && (a >= 1e5 || a < 1e-3)) return x.toExponential(d - 1);
    return Number(x.toPrecision(d)).toString();
  }

  /* about n round tick values covering [lo, hi] */
  function ticks(lo, hi, n) {
    if (!(hi > lo)) return [lo];
    const raw = (hi - lo) / Math.max(1, n);
    const mag = Math.pow(10, Math.floor(Math.log10(raw)));
    const step = [1, 2, 2.5, 5, 10].map(f => f * mag).find(s => s >= raw) || 10 * mag;
    const out = [];
    for (let v = Math.ceil(lo / step - 1e-9) * step; v <= hi + step * 1e-9; v += step) out.push(Math.abs(v) < step * 1e-9 ? 0 : v);
    return out;
  }

  function frame(w, h, cls, title) {
    const svg = node("svg", { viewBox: "0 0 " + w + " " + h, width: w, height: h, class: "plot " + (cls || ""), role: "img" });
    if (title) { svg.setAttribute("aria-label", title); tip(svg, title); }
    return svg;
  }

  /* Histogram of equal bins between lo and hi.
     o: {counts, lo, hi, width, height, spark, marks: [{x, label, cls}], xlabel, ylabel, title} */
  function histogram(o) {
    const W = o.width || 360, H = o.height || 160, spark = !!o.spark;
    const nm = (o.marks || []).filter(k => k.label).length;
    const m = spark ? { l: 1, r: 1, t: 2, b: 2 } : { l: 44, r: 14, t: 8 + 13 * Math.max(1, nm), b: 36 };
    const svg = frame(W, H, spark ? "spark" : "hist", o.title);
    if (spark) svg.setAttribute("preserveAspectRatio", "none");  // a card stretches its sparkline to its width
    const counts = o.counts || [];
    const iw = W - m.l - m.r, ih = H - m.t - m.b;
    const ymax = Math.max(1e-9, ...counts);
    const lo = o.lo, hi = o.hi > o.lo ? o.hi : o.lo + 1;
    const X = v => m.l + (v - lo) / (hi - lo) * iw;
    const Y = c => m.t + ih - c / ymax * ih;
    node("line", { x1: m.l, x2: m.l + iw, y1: m.t + ih, y2: m.t + ih, class: "axis" }, svg);
    if (!counts.length) return svg;
    const n = counts.length, bw = iw / n;
    if (spark) {
      // one path for all bars: cards draw many of these
      let d = "";
      counts.forEach((c, i) => {
        if (c <= 0) return;
        const h = Math.max(0.8, c / ymax * ih);
        d += "M" + (m.l + i * bw + 0.3).toFixed(1) + " " + (m.t + ih).toFixed(1) + "h" + Math.max(0.5, bw - 0.6).toFixed(1) + "v" + (-h).toFixed(1) + "h" + (-Math.max(0.5, bw - 0.6)).toFixed(1) + "z";
      });
      node("path", { d: d, class: "bar" }, svg);
    } else {
      ticks(0, ymax, 3).forEach(t => {  // grid lines first, so bars sit on top of them
        node("line", { x1: m.l - 3, x2: m.l + iw, y1: Y(t), y2: Y(t), class: t ? "gridline" : "axis" }, svg);
        label(svg, m.l - 6, Y(t) + 3.5, fmt(t), "tick", "end");
      });
      const step = (hi - lo) / n;
      counts.forEach((c, i) => {
        const h = c > 0 ? Math.max(1, c / ymax * ih) : 0;
        const r = node("rect", { x: (m.l + i * bw + 0.5).toFixed(2), y: (m.t + ih - h).toFixed(2), width: Math.max(0.5, bw - 1).toFixed(2), height: h.toFixed(2), class: "bar" }, svg);
        const a = lo + i * step, b = a + step;
        tip(r, fmt(a) + " to " + fmt(b) + ": " + fmt(c, 3) + " images");
      });
      if (o.hi > o.lo) ticks(lo, hi, 5).forEach(t => {
        node("line", { x1: X(t), x2: X(t), y1: m.t + ih, y2: m.t + ih + 4, class: "axis" }, svg);
        label(svg, X(t), m.t + ih + 15, fmt(t));
      });
      else label(svg, m.l + iw / 2, m.t + ih + 15, fmt(o.lo));
      if (o.xlabel) label(svg, m.l + iw / 2, H - 4, o.xlabel, "axislabel");
      if (o.ylabel) label(svg, m.l - 36, m.t - 6, o.ylabel, "axislabel", "start");
    }
    let row = 0;  // labelled marks get a line of their own above the plot
    (o.marks || []).forEach(k => {
      if (k.x === null || k.x === undefined || !isFinite(k.x)) return;
      const past = k.x > hi, before = k.x < lo;
      const x = past ? m.l + iw : before ? m.l : X(k.x);
      const g = node("g", { class: "mark " + (k.cls || "") }, svg);
      const ly = m.t - 6 - 13 * row;
      node("line", { x1: x, x2: x, y1: spark ? m.t : ly + 3, y2: m.t + ih, class: past || before ? "off" : "" }, g);
      if (!spark && k.label) {
        const right = x > m.l + iw * 0.6;  // the text runs away from the plot's edge
        label(g, x + (right ? -4 : 4), ly, past ? k.label + " →" : before ? "← " + k.label : k.label, "marklabel", right ? "end" : "start");
        row++;
      }
      tip(g, (k.label || "") + " " + fmt(k.x));
    });
    return svg;
  }

  /* Horizontal bars, one per label, with a zero line (values may be negative).
     o: {labels, values, highlight (index), width, title, unit} */
  function hbars(o) {
    const rowH = 18, W = o.width || 360, n = o.labels.length;
    const longest = Math.max(...o.labels.map(s => String(s).length));
    const m = { l: Math.min(150, 12 + 6.5 * longest), r: 56, t: 6, b: 6 };
    const fit = Math.floor((m.l - 12) / 6.5);  // longer labels are cut; the full one is in the tooltip
    const H = m.t + m.b + rowH * n;
    const svg = frame(W, H, "hbars", o.title);
    const vals = o.values.map(v => (v === null || !isFinite(v)) ? 0 : v);
    const lo = Math.min(0, ...vals), hi = Math.max(0, ...vals);
    const span = hi - lo || 1, iw = W - m.l - m.r;
    const X = v => m.l + (v - lo) / span * iw;
    o.labels.forEach((name, i) => {
      const y = m.t + i * rowH, v = vals[i];
      const g = node("g", { class: i === o.highlight ? "row top" : "row" }, svg);
      const text = String(name), shown = text.length > fit ? text.slice(0, fit - 1) + "…" : text;
      const t = label(g, m.l - 6, y + rowH / 2 + 4, shown, "rowlabel", "end");
      t.setAttribute("data-label", String(name));
      const x0 = X(Math.min(0, v)), x1 = X(Math.max(0, v));
      node("rect", { x: x0.toFixed(2), y: y + 3, width: Math.max(0.5, x1 - x0).toFixed(2), height: rowH - 6, class: "bar" }, g);
      label(g, x1 + 5, y + rowH / 2 + 4, fmt(o.values[i]), "tick", "start");
      tip(g, String(name) + ": " + fmt(o.values[i]));
    });
    node("line", { x1: X(0), x2: X(0), y1: m.t, y2: H - m.b, class: "axis" }, svg);
    return svg;
  }

  /* Line traces sharing axes. o: {series: [{x, y, name}], width, height, xlabel, ylabel, title} */
  function lines(o) {
    const W = o.width || 360, H = o.height || 170, m = { l: 48, r: 12, t: 12, b: 36 };
    const svg = frame(W, H, "lines", o.title);
    const xs = [], ys = [];
    o.series.forEach(s => s.x.forEach((x, i) => { if (s.y[i] !== null) { xs.push(x); ys.push(s.y[i]); } }));
    if (!xs.length) return svg;
    const x0 = Math.min(...xs), x1 = Math.max(...xs), yl = Math.min(...ys), yh = Math.max(...ys);
    const ypad = (yh - yl) * 0.06 || Math.abs(yh) * 0.1 || 1;
    const y0 = yl - ypad, y1 = yh + ypad;
    const iw = W - m.l - m.r, ih = H - m.t - m.b;
    const X = v => m.l + (x1 > x0 ? (v - x0) / (x1 - x0) : 0.5) * iw;
    const Y = v => m.t + ih - (v - y0) / (y1 - y0) * ih;
    ticks(y0, y1, 4).forEach(t => {
      node("line", { x1: m.l, x2: m.l + iw, y1: Y(t), y2: Y(t), class: "gridline" }, svg);
      label(svg, m.l - 6, Y(t) + 3.5, fmt(t), "tick", "end");
    });
    ticks(x0, x1, 5).forEach(t => label(svg, X(t), m.t + ih + 15, fmt(t)));
    node("line", { x1: m.l, x2: m.l + iw, y1: m.t + ih, y2: m.t + ih, class: "axis" }, svg);
    o.series.forEach((s, k) => {
      let d = "";
      s.x.forEach((x, i) => { if (s.y[i] !== null) d += (d ? "L" : "M") + X(x).toFixed(1) + " " + Y(s.y[i]).toFixed(1); });
      const p = node("path", { d: d, class: "line s" + (k % 4) }, svg);
      if (s.name) tip(p, s.name);
    });
    if (o.xlabel) label(svg, m.l + iw / 2, H - 4, o.xlabel, "axislabel");
    if (o.ylabel) label(svg, 4, 10, o.ylabel, "axislabel", "start");
    return svg;
  }

  /* Not plots, but shared by the pages that load this file. An HTML element whose text goes in as
     textContent, and the same appended to a parent: */
  function el(tag, cls, text) {
    const e = document.createElement(tag);
    if (cls) e.className = cls;
    if (text !== undefined && text !== null) e.textContent = String(text);
    return e;
  }
  function add(parent, tag, cls, text) { return parent.appendChild(el(tag, cls, text)); }

  /* unit ids typed as "12" or "10-40, 77" -> a test u => bool; null for an empty text, undefined
     for one that cannot be read */
  function unitFilter(text) {
    const t = text.trim();
    if (!t) return null;
    const ranges = [];
    for (const p of t.split(/[\s,]+/).filter(Boolean)) {
      const m = /^(\d+)(?:-(\d+))?$/.exec(p);
      if (!m) return undefined;
      const a = +m[1], b = m[2] === undefined ? a : +m[2];
      ranges.push([Math.min(a, b), Math.max(a, b)]);
    }
    return u => ranges.some(r => u >= r[0] && u <= r[1]);
  }

  window.ULPlot = { histogram: histogram, hbars: hbars, lines: lines, fmt: fmt, ticks: ticks, node: node,
    el: el, add: add, unitFilter: unitFilter };
})();
