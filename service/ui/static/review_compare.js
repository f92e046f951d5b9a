// The analyst's view of a night with both reviews in: each review's scoring under the figure, the
// epochs where they differ highlighted, their parameters side by side (computed by the service),
// and the ways to settle the night: accept one review, or store the analyst's own marks.
"use strict";
(function () {
  const $ = function (id) { return document.getElementById(id); };
  const when = function (iso) { return window.NightbankReviewTime(iso); };

  function fmt(v, digits) { return Number.isFinite(v) ? v.toFixed(digits === undefined ? 1 : digits) : "–"; }

  window.NightbankReviewCompare = function (page) {
    const box = $("compare");
    if (!box || box.getAttribute("data-ready")) return;
    box.setAttribute("data-ready", "1");
    const a = page.reviews[0], b = page.reviews[1], d = page.discrepancy;
    const pa = d.parameters_a || a.parameters || {}, pb = d.parameters_b || b.parameters || {};
    const diff = d.parameter_differences || {};

    const short = function (name) { return name.length > 12 ? name.slice(0, 11) + "…" : name; };
    page.figure.addStrip("review-a", "1st " + short(a.reviewer), a.labels);
    page.figure.addStrip("review-b", "2nd " + short(b.reviewer), b.labels);
    page.figure.setHighlights(d.differing_intervals || []);

    $("compare-a").textContent = "First review (" + a.reviewer + ")";
    $("compare-b").textContent = "Second review (" + b.reviewer + ")";
    document.querySelectorAll("#compare-parameters tbody tr").forEach(function (row) {
      const name = row.getAttribute("data-parameter");
      row.querySelector(".a").textContent = fmt(pa[name]);
      row.querySelector(".b").textContent = fmt(pb[name]);
      const delta = diff[name];
      row.querySelector(".diff").textContent = Number.isFinite(delta) ? (delta > 0 ? "+" : "") + fmt(delta) : "–";
      row.classList.toggle("differs", Number.isFinite(delta) && delta !== 0);
    });
    const kappa = Number.isFinite(d.kappa) ? "; Cohen's kappa between the two " + fmt(d.kappa, 2) : "";
    $("compare-summary").textContent = d.epochs_differing + " of " + d.epochs_compared +
      " epochs judged by both reviewers differ (highlighted in the figure, " +
      (d.differing_intervals || []).length + " stretch" + ((d.differing_intervals || []).length === 1 ? "" : "es") +
      ")" + kappa + ".";
    $("accept-a").textContent = "Accept " + a.reviewer + "'s review";
    $("accept-b").textContent = "Accept " + b.reviewer + "'s review";

    const choice = $("base-choice");
    [["model", "the model's calls (a review)"], ["review-a", a.reviewer + "'s review"],
      ["review-b", b.reviewer + "'s review"]].forEach(function (pair) {
      const option = document.createElement("option");
      option.value = pair[0];
      option.textContent = pair[1];
      choice.appendChild(option);
    });
    $("base-choice-box").hidden = false;
    choice.addEventListener("change", function () {
      const labels = choice.value === "review-a" ? a.labels : choice.value === "review-b" ? b.labels : null;
      page.setBase(choice.value, labels || page.data.context.calls);
    });
    box.hidden = false;
    if (page.correction) {
      $("adjudication-status").textContent = "A correction is stored (by " + page.correction.adjudicated_by + " at " +
        when(page.correction.adjudicated_at) + "); storing another replaces it.";
    }

    const status = $("adjudication-status");
    function settle(body) {
      const name = $("adjudicator-name").value.trim();
      if (!name) { status.textContent = "Give your name first."; return; }
      body.reviewer = name;
      body.note = $("adjudication-note").value.trim() || null;
      box.querySelectorAll("button").forEach(function (button) { button.disabled = true; });
      status.textContent = "Storing the correction…";
      page.send(page.data.urls.adjudication, body).then(function (stored) {
        const c = stored.correction || {};
        status.textContent = "Correction stored by " + c.adjudicated_by + " at " + when(c.adjudicated_at) +
          (body.accept ? " (review " + body.accept + " accepted)" : " (your marks)") + ".";
        status.setAttribute("data-state", "stored");
        $("review-state").textContent = String(stored.status || "adjudicated").replace("_", " ");
        box.querySelectorAll("button").forEach(function (button) { button.disabled = false; });
      }).catch(function (err) {
        box.querySelectorAll("button").forEach(function (button) { button.disabled = false; });
        status.textContent = "Not stored: " + err.message;
        status.setAttribute("data-state", "failed");
      });
    }
    $("accept-a").addEventListener("click", function () { settle({ accept: a.review_id }); });
    $("accept-b").addEventListener("click", function () { settle({ accept: b.review_id }); });
    $("adjudicate-marks").addEventListener("click", function () {
      if (choice.value === "model" && !page.markCount()) {
        status.textContent = "Choose a review under \"Marks change\" or make marks first.";
        return;
      }
      const body = page.reviewBody();
      delete body.reviewer;
      settle(body);
    });
  };
})();
