// Training progress: an element with data-job-url polls that JSON address once a second and shows
// the job's stage and progress; when the job has finished the page reloads once to show the new model.
"use strict";
(function () {
  const box = document.querySelector("[data-job-url]");
  if (!box) return;
  const url = box.getAttribute("data-job-url");
  const bar = box.querySelector("progress");
  const text = box.querySelector("[data-job-state]");

  function show(job) {
    if (job.total > 0) {
      bar.max = job.total;
      bar.value = job.done;
    }
    const pct = job.total > 0 ? " (" + Math.round(100 * job.done / job.total) + "%)" : "";
    text.textContent = job.state + ": " + job.stage + pct + (job.error ? " — " + job.error : "");
    box.setAttribute("data-job-finished", job.finished ? job.state : "");
  }

  function finish(job) {
    if (job.state === "succeeded") {
      text.textContent = "succeeded: model version " + (job.result && job.result.model_version) +
        (job.result && job.result.active ? " (active)" : " (candidate)") + ". Reloading…";
      const next = new URL(window.location.href);
      next.searchParams.delete("job");
      next.searchParams.set("done", job.job_id);
      window.setTimeout(function () { window.location.assign(next.toString()); }, 800);
    }
  }

  function poll() {
    fetch(url, { credentials: "same-origin", headers: { "Accept": "application/json" } })
      .then(function (r) {
        if (r.status >= 400 && r.status < 500) {
          text.textContent = "this job cannot be followed (status " + r.status + "); reload the page";
          return null;
        }
        if (!r.ok) throw new Error("status " + r.status);
        return r.json();
      })
      .then(function (job) {
        if (job === null) return;
        show(job);
        if (job.finished) finish(job); else window.setTimeout(poll, 1000);
      })
      .catch(function (err) {
        text.textContent = "could not read the job's state (" + err.message + "); retrying";
        window.setTimeout(poll, 3000);
      });
  }
  poll();
})();
