// The review figure: one night's counts, P(sleep), the model's calls and the reviewer's scoring,
// drawn as SVG on a shared epoch axis, with click-and-drag marking of epoch ranges.
// window.NightbankReviewFigure(container, night) -> figure; see the methods at the end.
// Epoch ranges are {start_epoch, end_epoch} with end_epoch exclusive, as the service expects.
"use strict";
(function () {
  const SVG = "http://www.w3.org/2000/svg";
  const WIDTH = 1200, LEFT = 118, RIGHT = 14, TOP = 8;
  const PLOT = WIDTH - LEFT - RIGHT;
  const COUNTS_H = 120, P_H = 64, STRIP_H = 16, GAP = 10, AXIS_H = 30;

  function el(name, attrs, parent) {
    const node = document.createElementNS(SVG, name);
    Object.keys(attrs || {}).forEach(function (k) { node.setAttribute(k, String(attrs[k])); });
    if (parent) parent.appendChild(node);
    return node;
  }

  function text(parent, x, y, value, cls, anchor) {
    const node = el("text", { x: x, y: y, "class": cls || "axis-label", "text-anchor": anchor || "end" }, parent);
    node.textContent = value;
    return node;
  }

  // Runs of equal values: [{start, end, value}] (end exclusive); null, undefined and NaN form "none" runs.
  function runs(values) {
    const out = [];
    const key = function (v) { return v === null || v === undefined || Number.isNaN(v) ? "none" : String(v); };
    for (let i = 0; i < values.length; i += 1) {
      const k = key(values[i]);
      if (out.length && out[out.length - 1].value === k) out[out.length - 1].end = i + 1;
      else out.push({ start: i, end: i + 1, value: k });
    }
    return out;
  }

  // Seconds after midnight of the night's start, read from its ISO text (the recording's own clock).
  function clockStart(iso) {
    const m = /T(\d\d):(\d\d)(?::(\d\d))?/.exec(iso || "");
    return m ? (+m[1]) * 3600 + (+m[2]) * 60 + (+(m[3] || 0)) : null;
  }

  function clock(seconds) {
    const s = ((Math.round(seconds) % 86400) + 86400) % 86400;
    const h = Math.floor(s / 3600), m = Math.floor((s % 3600) / 60);
    return (h < 10 ? "0" : "") + h + ":" + (m < 10 ? "0" : "") + m;
  }

  function quantile(values, q) {
    const finite = values.filter(function (v) { return Number.isFinite(v); }).sort(function (a, b) { return a - b; });
    if (!finite.length) return 1;
    return finite[Math.min(finite.length - 1, Math.floor(q * (finite.length - 1)))];
  }

  // A stored time stamp for people: "2026-12-03 19:06 UTC" (the text itself when it is not a time).
  window.NightbankReviewTime = function (iso) {
    const t = new Date(iso);
    return Number.isNaN(t.getTime()) ? String(iso) : t.toISOString().slice(0, 16).replace("T", " ") + " UTC";
  };

  window.NightbankReviewFigure = function (container, night) {
    const n = night.counts.length;
    const epochW = PLOT / Math.max(n, 1);
    const t0 = clockStart(night.start);
    const hasP = Array.isArray(night.p_sleep) && night.p_sleep.some(function (v) { return Number.isFinite(v); });
    const strips = [{ key: "model", label: "model's calls" }, { key: "marked", label: "with the marks" }];
    const rowLabels = {};
    let labels = { model: night.calls, marked: night.calls };
    let marks = [], rest = null, highlights = [], pending = null, locked = false;
    let onMark = function () {}, onHover = function () {};
    let svg, overlay, selection, layout;

    function x(epoch) { return LEFT + epoch * epochW; }

    function computeLayout() {
      let y = TOP;
      const out = { counts: [y, y + COUNTS_H] };
      y += COUNTS_H + GAP;
      if (hasP) { out.p = [y, y + P_H]; y += P_H + GAP; }
      out.strips = {};
      strips.forEach(function (s) { out.strips[s.key] = [y, y + STRIP_H]; y += STRIP_H + 4; });
      out.bottom = y;
      out.height = y + AXIS_H;
      return out;
    }

    function drawCounts(g) {
      const [y0, y1] = layout.counts;
      const cap = Math.max(quantile(night.counts, 0.99), 1);
      let d = "";
      night.counts.forEach(function (c, i) {
        if (!Number.isFinite(c) || c <= 0) return;
        const h = (Math.min(c, cap) / cap) * (y1 - y0);
        d += "M" + (x(i) + epochW / 2).toFixed(2) + " " + y1 + "V" + (y1 - h).toFixed(2);
      });
      el("rect", { x: LEFT, y: y0, width: PLOT, height: y1 - y0, "class": "panel" }, g);
      el("path", { d: d, "class": "counts", "stroke-width": Math.max(epochW * 0.9, 0.6) }, g);
      text(g, LEFT - 6, y0 + 10, String(Math.round(cap)));
      text(g, LEFT - 6, y1, "0");
      text(g, LEFT - 6, (y0 + y1) / 2 + 4, "counts", "row-label");
    }

    function drawP(g) {
      const [y0, y1] = layout.p;
      el("rect", { x: LEFT, y: y0, width: PLOT, height: y1 - y0, "class": "panel" }, g);
      el("line", { x1: LEFT, x2: LEFT + PLOT, y1: (y0 + y1) / 2, y2: (y0 + y1) / 2, "class": "half" }, g);
      let d = "", pen = false;
      night.p_sleep.forEach(function (p, i) {
        if (!Number.isFinite(p)) { pen = false; return; }
        const yy = y1 - p * (y1 - y0);
        d += (pen ? "L" : "M") + (x(i) + epochW / 2).toFixed(2) + " " + yy.toFixed(2);
        pen = true;
      });
      el("path", { d: d, "class": "p-sleep" }, g);
      text(g, LEFT - 6, y0 + 10, "1");
      text(g, LEFT - 6, y1, "0");
      text(g, LEFT - 6, (y0 + y1) / 2 + 4, "P(sleep)", "row-label");
    }

    function drawStrip(g, key) {
      const [y0, y1] = layout.strips[key];
      const values = labels[key] || [];
      const row = el("g", { "class": "strip", "data-row": key }, g);
      runs(values).forEach(function (r) {
        const cls = r.value === "1" ? "sleep" : r.value === "0" ? "wake" : "unjudged";
        el("rect", { x: x(r.start), y: y0, width: (r.end - r.start) * epochW, height: y1 - y0, "class": cls,
          "data-start": r.start, "data-end": r.end }, row);
      });
      rowLabels[key] = text(g, LEFT - 6, y1 - 3, (strips.find(function (s) { return s.key === key; }) || {}).label,
        "row-label");
    }

    function drawAxis(g) {
      const y = layout.bottom + 4;
      el("line", { x1: LEFT, x2: LEFT + PLOT, y1: y, y2: y, "class": "axis" }, g);
      const seconds = n * night.epoch_seconds;
      const first = t0 === null ? 0 : (3600 - (t0 % 3600)) % 3600;
      for (let s = first; s <= seconds; s += 3600) {
        const xx = x(s / night.epoch_seconds);
        el("line", { x1: xx, x2: xx, y1: y, y2: y + 5, "class": "axis" }, g);
        text(g, xx, y + 18, t0 === null ? (s / 3600).toFixed(0) + " h" : clock(t0 + s), "axis-label", "middle");
      }
      text(g, LEFT - 6, y + 18, t0 === null ? "hours" : "clock", "row-label");
    }

    function drawOverlay() {
      while (overlay.firstChild) overlay.removeChild(overlay.firstChild);
      const top = layout.counts[0], bottom = layout.bottom;
      const span = function (r, cls, attrs) {
        return el("rect", Object.assign({ x: x(r.start_epoch), y: top, width: (r.end_epoch - r.start_epoch) * epochW,
          height: bottom - top, "class": cls }, attrs || {}), overlay);
      };
      highlights.forEach(function (r) { span(r, "differ"); });
      const shown = rest || (night.in_bed ? { start_epoch: night.in_bed[0], end_epoch: night.in_bed[1] } : null);
      if (shown) {
        if (shown.start_epoch > 0) span({ start_epoch: 0, end_epoch: shown.start_epoch }, "out-of-bed");
        if (shown.end_epoch < n) span({ start_epoch: shown.end_epoch, end_epoch: n }, "out-of-bed");
        span(shown, rest ? "rest marked" : "rest");
      }
      marks.forEach(function (m, i) {
        if (m.kind !== "rest") span(m, "mark mark-" + m.kind, { "data-mark": i });
      });
    }

    function draw() {
      layout = computeLayout();
      container.textContent = "";
      svg = el("svg", { viewBox: "0 0 " + WIDTH + " " + layout.height,
        "class": "review-svg" + (locked ? " locked" : ""), role: "img",
        "aria-label": "Counts, P(sleep), the model's calls and the scoring with the marks, epoch by epoch; " +
          "drag across it to mark" }, container);
      const base = el("g", {}, svg);
      drawCounts(base);
      if (hasP) drawP(base);
      strips.forEach(function (s) { drawStrip(base, s.key); });
      drawAxis(base);
      overlay = el("g", { "class": "overlay" }, svg);
      selection = el("rect", { x: 0, y: layout.counts[0], width: 0, height: layout.bottom - layout.counts[0],
        "class": "selection", visibility: "hidden" }, svg);
      drawOverlay();
      svg.addEventListener("pointerdown", down);
      svg.addEventListener("pointermove", move);
      svg.addEventListener("pointerup", up);
      svg.addEventListener("pointercancel", cancel);
      svg.addEventListener("pointerleave", function () { if (!pending) onHover(null); });
    }

    function epochAt(event) {
      const box = svg.getBoundingClientRect();
      const vx = (event.clientX - box.left) * (WIDTH / box.width);
      return Math.max(0, Math.min(n - 1, Math.floor((vx - LEFT) / epochW)));
    }

    function showSelection(a, b) {
      const lo = Math.min(a, b), hi = Math.max(a, b) + 1;
      selection.setAttribute("x", x(lo));
      selection.setAttribute("width", (hi - lo) * epochW);
      selection.setAttribute("visibility", "visible");
      return { start_epoch: lo, end_epoch: hi };
    }

    function down(event) {
      if (locked || event.button !== 0) return;
      const box = svg.getBoundingClientRect();
      if ((event.clientX - box.left) * (WIDTH / box.width) < LEFT) return;
      pending = { anchor: epochAt(event), pointer: event.pointerId };
      svg.setPointerCapture(event.pointerId);
      showSelection(pending.anchor, pending.anchor);
      event.preventDefault();
    }

    function move(event) {
      const epoch = epochAt(event);
      onHover(epoch, pending ? showSelection(pending.anchor, epoch) : null);
    }

    function up(event) {
      if (!pending) return;
      const range = showSelection(pending.anchor, epochAt(event));
      cancel();
      onMark(range);
    }

    function cancel() {
      if (pending && svg.hasPointerCapture(pending.pointer)) svg.releasePointerCapture(pending.pointer);
      pending = null;
      selection.setAttribute("visibility", "hidden");
    }

    draw();
    return {
      n_epochs: n,
      // Per-epoch values of one strip ("model", "marked", or a key added with addStrip).
      setLabels: function (key, values) {
        labels[key] = values;
        const row = svg.querySelector('g.strip[data-row="' + key + '"]');
        if (row) { row.remove(); rowLabels[key].remove(); drawStrip(svg.firstChild, key); }
      },
      addStrip: function (key, label, values) {
        if (!strips.some(function (s) { return s.key === key; })) strips.push({ key: key, label: label });
        labels[key] = values;
        draw();
      },
      setMarks: function (list, restInterval) { marks = list; rest = restInterval; drawOverlay(); },
      setHighlights: function (ranges) { highlights = ranges || []; drawOverlay(); },
      setLocked: function (value) { locked = value; svg.classList.toggle("locked", value); cancel(); },
      onMark: function (callback) { onMark = callback; },
      onHover: function (callback) { onHover = callback; },
      cancelDrag: cancel,
      // The epoch at a clock time "HH:MM" of the recording's clock (the first such time after the start).
      epochAtClock: function (hhmm) {
        const m = /^(\d\d):(\d\d)/.exec(hhmm || "");
        if (!m || t0 === null) return null;
        const after = (((+m[1]) * 3600 + (+m[2]) * 60 - t0) % 86400 + 86400) % 86400;
        return Math.round(after / night.epoch_seconds);
      },
      clock: function (epoch) {
        return t0 === null ? (epoch * night.epoch_seconds / 3600).toFixed(2) + " h"
          : clock(t0 + epoch * night.epoch_seconds);
      },
    };
  };
})();
