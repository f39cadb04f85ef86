// study-audit: sort and filter the studies table in the page itself (no server, no library).
(function () {
  "use strict";
  var table = document.getElementById("studies-table");
  if (!table) { return; }
  var body = table.tBodies[0];
  var rows = Array.prototype.slice.call(body.rows);
  var texts = rows.map(function (r) { return r.textContent.toLowerCase(); });
  var search = document.getElementById("studies-filter");
  var severity = document.getElementById("studies-severity");
  var shown = document.getElementById("studies-shown");
  var controls = document.getElementById("studies-controls");
  if (controls) { controls.hidden = false; }

  function cellValue(row, index, numeric) {
    var cell = row.cells[index];
    var raw = cell.hasAttribute("data-sort") ? cell.getAttribute("data-sort") : cell.textContent;
    if (!numeric) { return raw.trim().toLowerCase(); }
    return raw === "" ? null : parseFloat(raw);
  }

  function sortBy(header) {
    var index = header.cellIndex;
    var numeric = header.getAttribute("data-type") === "number";
    var ascending = header.getAttribute("aria-sort") !== "ascending";
    var keyed = rows.map(function (row, i) {
      return { row: row, key: cellValue(row, index, numeric), i: i };
    });
    keyed.sort(function (a, b) {
      // Unknown values last whichever way; ties keep input order.
      if (a.key === null || b.key === null) {
        if (a.key === b.key) { return a.i - b.i; }
        return a.key === null ? 1 : -1;
      }
      var c = a.key < b.key ? -1 : (a.key > b.key ? 1 : 0);
      return (ascending ? c : -c) || a.i - b.i;
    });
    var heads = table.tHead.rows[0].cells;
    for (var h = 0; h < heads.length; h++) { heads[h].removeAttribute("aria-sort"); }
    header.setAttribute("aria-sort", ascending ? "ascending" : "descending");
    var fragment = document.createDocumentFragment();
    keyed.forEach(function (k) { fragment.appendChild(k.row); });
    body.appendChild(fragment);
  }

  function applyFilter() {
    var words = (search ? search.value : "").toLowerCase().split(/\s+/).filter(Boolean);
    var wanted = severity ? severity.value : "";
    var count = 0;
    rows.forEach(function (row, i) {
      var ok = words.every(function (w) { return texts[i].indexOf(w) !== -1; });
      if (ok && wanted) { ok = row.getAttribute("data-worst") === wanted; }
      row.hidden = !ok;
      if (ok) { count++; }
    });
    if (shown) { shown.textContent = count + " of " + rows.length + " studies shown"; }
  }

  var heads = table.tHead.rows[0].cells;
  for (var h = 0; h < heads.length; h++) {
    (function (header) {
      var button = header.querySelector("button");
      if (button) { button.addEventListener("click", function () { sortBy(header); }); }
    })(heads[h]);
  }
  if (search) { search.addEventListener("input", applyFilter); }
  if (severity) { severity.addEventListener("change", applyFilter); }
  // Printing opens the folded details (rationales), so that paper holds them.
  window.addEventListener("beforeprint", function () {
    Array.prototype.forEach.call(document.querySelectorAll("details"), function (d) {
      d.setAttribute("open", "");
    });
  });
  applyFilter();
})();
