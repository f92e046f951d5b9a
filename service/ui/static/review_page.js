// The review page: marks (wake, sleep, the rest interval) made on the figure, the parameters the
// service computes for them, submitting a review, and for analysts the two reviews side by side.
// The page never computes sleep parameters itself: every figure in the tables comes from the service.
"use strict";
(function () {
  const data = JSON.parse(document.getElementById("review-data").textContent);
  const night = data.context;
  const figure = window.NightbankReviewFigure(document.getElementById("review-plot"), night);
  const $ = function (id) { return document.getElementById(id); };
  const when = function (iso) { return window.NightbankReviewTime(iso); };
  const KIND_NAMES = { wake: "wake", sleep: "sleep", rest: "rest interval" };
  const state = { mode: "wake", marks: [], base: { key: "model", labels: night.calls.slice() }, locked: false,
    previewSeq: 0, previewTimer: null, reviews: null };

  // ---- talking to the service (through the page's own JSON routes) ----
  function send(url, body) {
    const headers = { "Content-Type": "application/json", "Accept": "application/json" };
    headers[data.form_token_header] = data.form_token;
    return fetch(url, { method: "POST", credentials: "same-origin", headers: headers, body: JSON.stringify(body) })
      .then(answer);
  }

  function answer(r) {
    return r.text().then(function (raw) {
      let body = null;
      try { body = raw ? JSON.parse(raw) : null; } catch (e) { body = null; }
      if (!r.ok) {
        const where = body && Array.isArray(body.problems) && body.problems.length
          ? " (" + body.problems.map(function (p) { return p.location || p.message; }).join("; ") + ")" : "";
        const error = new Error(((body && body.detail) || "the service answered " + r.status) + where);
        error.status = r.status;
        throw error;
      }
      return body;
    });
  }

  // ---- marks and the scoring they give ----
  function restMark() {
    for (let i = state.marks.length - 1; i >= 0; i -= 1) if (state.marks[i].kind === "rest") return state.marks[i];
    return null;
  }

  // The rest interval judged: the last one marked, else the recorded in-bed period the figure outlines.
  function restInterval() {
    const marked = restMark();
    if (marked) return range(marked);
    return Array.isArray(night.in_bed) ? { start_epoch: night.in_bed[0], end_epoch: night.in_bed[1] } : null;
  }

  function range(m) { return { start_epoch: m.start_epoch, end_epoch: m.end_epoch }; }

  // The scoring shown in the "with the marks" strip: the base, wake marks, then sleep marks, and
  // nothing judged outside the rest interval. (Display only; the service applies the marks itself.)
  function markedLabels() {
    const out = state.base.labels.slice();
    ["wake", "sleep"].forEach(function (kind) {
      state.marks.forEach(function (m) {
        if (m.kind !== kind) return;
        for (let i = m.start_epoch; i < m.end_epoch; i += 1) out[i] = kind === "sleep" ? 1 : 0;
      });
    });
    const rest = restInterval();
    if (rest) for (let i = 0; i < out.length; i += 1) if (i < rest.start_epoch || i >= rest.end_epoch) out[i] = null;
    return out;
  }

  // The body of a review, a preview or an adjudicated correction.
  function reviewBody() {
    const body = { reviewer: $("reviewer-name").value.trim(), note: $("review-note").value.trim() || null };
    if (state.base.key === "model") {
      body.wake_intervals = state.marks.filter(function (m) { return m.kind === "wake"; }).map(range);
      body.sleep_intervals = state.marks.filter(function (m) { return m.kind === "sleep"; }).map(range);
      body.rest_interval = restInterval();
    } else {
      body.labels = markedLabels();
    }
    return body;
  }

  function changed() {
    figure.setMarks(state.marks, restMark() && range(restMark()));
    figure.setLabels("marked", markedLabels());
    $("undo-mark").disabled = state.locked || !state.marks.length;
    $("clear-marks").disabled = state.locked || !state.marks.length;
    listMarks();
    schedulePreview();
  }

  function listMarks() {
    const list = $("mark-list");
    list.textContent = "";
    $("no-marks").hidden = state.marks.length > 0;
    state.marks.forEach(function (m, i) {
      const item = document.createElement("li");
      item.className = "mark-item mark-" + m.kind;
      const epochs = m.end_epoch - m.start_epoch;
      item.appendChild(document.createTextNode(KIND_NAMES[m.kind] + ": " + figure.clock(m.start_epoch) + " – " +
        figure.clock(m.end_epoch) + " (" + epochs + " epoch" + (epochs === 1 ? "" : "s") + ", epochs " +
        m.start_epoch + "–" + (m.end_epoch - 1) + ") "));
      const remove = document.createElement("button");
      remove.type = "button";
      remove.className = "quiet";
      remove.textContent = "remove";
      remove.setAttribute("aria-label", "remove mark " + (i + 1));
      remove.disabled = state.locked;
      remove.addEventListener("click", function () { state.marks.splice(i, 1); changed(); });
      item.appendChild(remove);
      list.appendChild(item);
    });
  }

  function addMark(r) {
    if (state.locked) return;
    state.marks.push({ kind: state.mode, start_epoch: r.start_epoch, end_epoch: r.end_epoch });
    changed();
  }

  function undo() {
    if (state.locked || !state.marks.length) return;
    state.marks.pop();
    changed();
  }

  function setMode(mode) {
    state.mode = mode;
    document.querySelectorAll('input[name="mark-mode"]').forEach(function (r) { r.checked = r.value === mode; });
  }

  // ---- parameters from the service ----
  function fmt(v, digits) { return Number.isFinite(v) ? v.toFixed(digits === undefined ? 1 : digits) : "–"; }

  function showParameters(parameters) {
    document.querySelectorAll("#review-parameters tbody tr").forEach(function (row) {
      const name = row.getAttribute("data-parameter");
      const model = (night.parameters || {})[name], marked = parameters[name];
      const span = (night.intervals || {})[name];
      row.querySelector(".marked").textContent = fmt(marked);
      const change = Number.isFinite(model) && Number.isFinite(marked) ? marked - model : NaN;
      const cell = row.querySelector(".change");
      cell.textContent = Number.isFinite(change) ? (change > 0 ? "+" : "") + fmt(change) : "–";
      const outside = Array.isArray(span) && Number.isFinite(marked) && change !== 0 &&
        (marked < span[0] || marked > span[1]);
      cell.classList.toggle("beyond", outside);
      row.querySelector(".marked").classList.toggle("beyond", outside);
    });
  }

  function schedulePreview() {
    window.clearTimeout(state.previewTimer);
    $("preview-status").setAttribute("data-state", "pending");
    state.previewTimer = window.setTimeout(preview, 150);
  }

  function preview() {
    const seq = ++state.previewSeq;
    const status = $("preview-status");
    status.textContent = "Updating the parameters…";
    status.setAttribute("data-state", "pending");
    const body = reviewBody();
    delete body.reviewer;
    send(data.urls.preview, body).then(function (result) {
      if (seq !== state.previewSeq) return;
      showParameters(result.parameters || {});
      status.textContent = state.marks.length ? "Parameters with " + state.marks.length + " mark" +
        (state.marks.length === 1 ? "" : "s") + "." : "Parameters of the scoring shown (no marks).";
      status.setAttribute("data-state", "done");
    }).catch(function (err) {
      if (seq !== state.previewSeq) return;
      status.textContent = "The parameters could not be updated: " + err.message;
      status.setAttribute("data-state", "failed");
    });
  }

  // ---- submitting ----
  function lock(why) {
    state.locked = true;
    figure.setLocked(true);
    $("submit-review").disabled = true;
    $("undo-mark").disabled = true;
    $("clear-marks").disabled = true;
    document.querySelectorAll("#mark-mode input").forEach(function (r) { r.disabled = true; });
    listMarks();
    if (why) $("submit-status").textContent = why;
  }

  function submit(event) {
    event.preventDefault();
    const body = reviewBody();
    if (!body.reviewer) { $("submit-status").textContent = "Give your reviewer name first."; return; }
    if (body.labels) {
      $("submit-status").textContent = "Reviews start from the model's calls; choose it under \"Marks change\".";
      return;
    }
    $("submit-review").disabled = true;
    $("submit-status").textContent = "Submitting…";
    send(data.urls.reviews, body).then(function (stored) {
      lock("Review submitted by " + stored.reviewer + " at " + when(stored.submitted_at) + " (review " +
        stored.review_id + "). The night is now " + String(stored.status || "").replace("_", " ") + ".");
      $("submit-status").setAttribute("data-state", "submitted");
      if (stored.status) $("review-state").textContent = String(stored.status).replace("_", " ");
      if (stored.parameters) showParameters(stored.parameters);
      loadReviews();
    }).catch(function (err) {
      $("submit-review").disabled = false;
      $("submit-status").textContent = "Not submitted: " + err.message;
      $("submit-status").setAttribute("data-state", "failed");
    });
  }

  // ---- the reviews already in ----
  function loadReviews() {
    fetch(data.urls.reviews, { credentials: "same-origin", headers: { "Accept": "application/json" } }).then(answer)
      .then(function (body) {
        state.reviews = body;
        showReviews(body);
      }).catch(function (err) {
        $("reviews-summary").textContent = "The reviews could not be read: " + err.message;
      });
  }

  function plural(k, word) { return k + " " + word + (k === 1 ? "" : "s"); }

  function showReviews(body) {
    const reviews = body.data || [];
    const withContent = reviews.filter(function (r) { return Array.isArray(r.labels); });
    const own = reviews.find(function (r) { return r.own; });
    const needed = Number.isFinite(body.reviews_needed) ? body.reviews_needed : 0;
    // Two reviews per night: the ones submitted are those no longer needed (some may be hidden from this viewer).
    const count = needed > 0 ? Math.max(reviews.length, 2 - needed) : reviews.length;
    let text = count === 0 ? "No review submitted yet" : plural(count, "review") + " submitted";
    text += reviews.length ? " (" + reviews.map(function (r) {
      return (r.own ? "yours, as " : "") + r.reviewer + " at " + when(r.submitted_at); }).join("; ") + ")." : ".";
    if (needed > 0) text += " " + plural(needed, "more review") + " needed; what each reviewer marked stays hidden " +
      "until both are in.";
    const c = body.correction;
    if (c) {
      text += " Correction stored by " + c.adjudicated_by + " at " + when(c.adjudicated_at) +
        (c.accepted_review_id ? " (review " + c.accepted_review_id + " accepted)." : " (the adjudicator's own marks).");
    }
    $("reviews-summary").textContent = text;
    $("reviews-summary").setAttribute("data-count", String(count));
    $("reviews-summary").setAttribute("data-needed", String(body.reviews_needed));
    if (body.status) $("review-state").textContent = String(body.status).replace("_", " ");
    const bothIn = body.reviews_needed === 0;
    if (bothIn) $("submit-section").hidden = true;
    else if (own && !state.locked) {
      lock("You reviewed this night at " + when(own.submitted_at) + ".");
      if (Array.isArray(own.labels)) figure.setLabels("marked", own.labels);
      if (own.parameters) showParameters(own.parameters);
    }
    if (data.analyse && body.discrepancy && withContent.length >= 2 && window.NightbankReviewCompare) {
      window.NightbankReviewCompare({ data: data, figure: figure, reviews: withContent, discrepancy: body.discrepancy,
        correction: body.correction, send: send, setBase: setBase, reviewBody: reviewBody,
        markCount: function () { return state.marks.length; }, reload: loadReviews });
    } else if (bothIn && !data.analyse) {
      lock("Both reviews are in; an analyst settles the night.");
    }
  }

  // Which scoring the marks change: the model's calls (a review) or one review's labels (an analyst's correction).
  function setBase(key, labels) {
    state.base = { key: key, labels: labels.slice() };
    state.locked = false;
    figure.setLocked(false);
    document.querySelectorAll("#mark-mode input").forEach(function (r) { r.disabled = false; });
    changed();
  }

  // ---- wiring ----
  figure.onMark(addMark);
  figure.onHover(function (epoch, selecting) {
    const out = $("hover-readout");
    if (epoch === null) { out.textContent = "Point at the figure to read an epoch; drag to mark."; return; }
    const call = function (v) { return v === 1 ? "sleep" : v === 0 ? "wake" : "not judged"; };
    const p = Array.isArray(night.p_sleep) ? night.p_sleep[epoch] : null;
    let line = figure.clock(epoch) + " · epoch " + epoch + " · counts " + fmt(night.counts[epoch], 0) +
      (Number.isFinite(p) ? " · P(sleep) " + fmt(p, 2) : "") + " · model: " + call(night.calls[epoch]) +
      " · with the marks: " + call(markedLabels()[epoch]);
    if (selecting) line = "marking " + KIND_NAMES[state.mode] + " " + figure.clock(selecting.start_epoch) + " – " +
      figure.clock(selecting.end_epoch) + " (" + (selecting.end_epoch - selecting.start_epoch) + " epochs)";
    out.textContent = line;
  });
  document.querySelectorAll('input[name="mark-mode"]').forEach(function (r) {
    r.addEventListener("change", function () { if (r.checked) setMode(r.value); });
  });
  $("undo-mark").addEventListener("click", undo);
  $("clear-marks").addEventListener("click", function () { state.marks = []; changed(); });
  $("review-form").addEventListener("submit", submit);
  $("mark-by-time").addEventListener("submit", function (event) {
    event.preventDefault();
    const from = figure.epochAtClock($("mark-from").value), until = figure.epochAtClock($("mark-to").value);
    const out = $("mark-by-time-status");
    if (from === null || until === null || until <= from || until > figure.n_epochs) {
      out.textContent = "Give two times inside the recording (" + figure.clock(0) + " – " +
        figure.clock(figure.n_epochs) + "), the second after the first.";
      out.setAttribute("data-state", "failed");
      return;
    }
    out.textContent = "";
    out.removeAttribute("data-state");
    addMark({ start_epoch: from, end_epoch: until });
  });

  document.addEventListener("keydown", function (event) {
    const target = event.target;
    if (event.altKey || event.metaKey || (event.ctrlKey && event.key !== "z")) return;
    if (target && (target.isContentEditable || /^(INPUT|TEXTAREA|SELECT)$/.test(target.tagName)) &&
        !(target.type === "radio")) return;
    const key = event.key.toLowerCase();
    if (event.key === "Escape") { figure.cancelDrag(); return; }
    if (event.ctrlKey && key === "z") { undo(); event.preventDefault(); return; }
    if (key === "w" || key === "s" || key === "r") {
      if (!state.locked) setMode({ w: "wake", s: "sleep", r: "rest" }[key]);
    } else if (key === "u") {
      undo();
    } else if (key === "n" || key === "p") {
      const link = $(key === "n" ? "queue-next" : "queue-previous");
      if (link) window.location.assign(link.href);
    } else {
      return;
    }
    event.preventDefault();
  });

  changed();
  loadReviews();
})();
