// halfcycle pages: sortable tables (click a header; numbers and times sort by value).
"use strict";
(function () {
  function key(cell, numeric) {
    var holder = cell.querySelector("[data-sort]") || cell;
    var raw = holder.getAttribute("data-sort");
    var text = raw !== null ? raw : cell.textContent.trim();
    if (numeric || raw !== null) {
      var n = parseFloat(text);
      return isNaN(n) ? -Infinity : n;
    }
    return text.toLowerCase();
  }
  function sortBy(table, th) {
    var index = Array.prototype.indexOf.call(th.parentNode.children, th);
    var numeric = th.getAttribute("data-type") === "num";
    var ascending = th.getAttribute("aria-sort") !== "ascending";
    Array.prototype.forEach.call(th.parentNode.children, function (h) { h.removeAttribute("aria-sort"); });
    th.setAttribute("aria-sort", ascending ? "ascending" : "descending");
    var body = table.tBodies[0];
    var rows = Array.prototype.slice.call(body.rows);
    rows.sort(function (a, b) {
      var x = key(a.cells[index], numeric), y = key(b.cells[index], numeric);
      return (x < y ? -1 : x > y ? 1 : 0) * (ascending ? 1 : -1);
    });
    rows.forEach(function (r) { body.appendChild(r); });
  }
  window.hcSortable = function (root) {
    (root || document).querySelectorAll("table.sortable").forEach(function (table) {
      if (!table.tHead || table.dataset.sortable) { return; }
      table.dataset.sortable = "1";
      table.tHead.querySelectorAll("th").forEach(function (th) {
        th.addEventListener("click", function () { sortBy(table, th); });
      });
    });
  };
  window.hcSortable(document);
})();
