// detdiff report: sortable tables and the detector-box toggle. No network, no inline handlers.
(function () {
  "use strict";

  function cellValue(cell) {
    if (!cell) { return ""; }
    var raw = cell.getAttribute("data-v");
    return (raw !== null ? raw : cell.textContent).trim();
  }

  function isNumber(text) {
    return text !== "" && isFinite(Number(text));
  }

  // Numbers compare as numbers, text as text with digits read as numbers ("img_9" before "img_10").
  function compare(a, b) {
    if (isNumber(a) && isNumber(b)) { return Number(a) - Number(b); }
    return a.localeCompare(b, undefined, { numeric: true, sensitivity: "base" });
  }

  function sortBy(table, index, th) {
    var current = th.getAttribute("aria-sort");
    var firstDescending = th.getAttribute("data-type") === "num";
    var ascending = current ? current === "descending" : !firstDescending;
    Array.prototype.forEach.call(table.tHead.rows[0].cells, function (h) { h.removeAttribute("aria-sort"); });
    th.setAttribute("aria-sort", ascending ? "ascending" : "descending");
    var body = table.tBodies[0];
    var keyed = Array.prototype.map.call(body.rows, function (row, i) {
      return { row: row, i: i, v: cellValue(row.cells[index]) };
    });
    keyed.sort(function (p, q) {
      if ((p.v === "") !== (q.v === "")) { return p.v === "" ? 1 : -1; }  // empty cells last, either way
      var c = compare(p.v, q.v);
      if (c === 0) { return p.i - q.i; }
      return ascending ? c : -c;
    });
    var fragment = document.createDocumentFragment();
    keyed.forEach(function (k) { fragment.appendChild(k.row); });
    body.appendChild(fragment);
  }

  document.querySelectorAll("table.sortable").forEach(function (table) {
    if (!table.tHead || !table.tBodies.length) { return; }
    Array.prototype.forEach.call(table.tHead.rows[0].cells, function (th, index) {
      var button = th.querySelector("button");
      if (button) { button.addEventListener("click", function () { sortBy(table, index, th); }); }
    });
  });

  document.querySelectorAll("input.toggle-pred").forEach(function (box) {
    box.addEventListener("change", function () {
      document.body.classList.toggle("hide-pred", !box.checked);
      document.querySelectorAll("input.toggle-pred").forEach(function (other) { other.checked = box.checked; });
    });
  });
})();
