// Sortable tables: a <table class="sortable"> whose header cells hold <button data-sort="number|text">.
// Numeric cells may carry data-value (the number behind a formatted cell); empty values sort last.
"use strict";
(function () {
  function cellValue(row, index, kind) {
    const cell = row.cells[index];
    const raw = cell.hasAttribute("data-value") ? cell.getAttribute("data-value") : cell.textContent.trim();
    if (kind === "number") {
      const x = parseFloat(raw);
      return Number.isFinite(x) ? x : null;
    }
    return raw === "" || raw === "–" ? null : raw.toLowerCase();
  }

  function sortBy(table, header, kind) {
    const index = Array.prototype.indexOf.call(header.parentNode.children, header);
    const ascending = header.getAttribute("aria-sort") !== "ascending";
    const body = table.tBodies[0];
    const rows = Array.from(body.rows);
    rows.sort(function (a, b) {
      const x = cellValue(a, index, kind), y = cellValue(b, index, kind);
      if (x === null && y === null) return 0;
      if (x === null) return 1;
      if (y === null) return -1;
      const order = x < y ? -1 : x > y ? 1 : 0;
      return ascending ? order : -order;
    });
    rows.forEach(function (row) { body.appendChild(row); });
    table.querySelectorAll("th[aria-sort]").forEach(function (th) { th.removeAttribute("aria-sort"); });
    header.setAttribute("aria-sort", ascending ? "ascending" : "descending");
  }

  document.querySelectorAll("table.sortable").forEach(function (table) {
    table.querySelectorAll("th button[data-sort]").forEach(function (button) {
      button.addEventListener("click", function () {
        sortBy(table, button.closest("th"), button.getAttribute("data-sort"));
      });
    });
  });
})();
