// Sort a table by a column when its header button is pressed (numbers by value).
document.querySelectorAll("table.sortable").forEach(function (table) {
  table.classList.add("sort-ready");
  table.querySelectorAll("th button").forEach(function (button, column) {
    button.addEventListener("click", function () {
      var th = button.parentNode, up = th.getAttribute("aria-sort") !== "ascending";
      table.querySelectorAll("th").forEach(function (h) { h.removeAttribute("aria-sort"); });
      th.setAttribute("aria-sort", up ? "ascending" : "descending");
      var body = table.tBodies[0], rows = Array.prototype.slice.call(body.rows);
      function key(row) {
        var cell = row.cells[column], v = cell.getAttribute("data-value");
        return v === null ? cell.textContent : parseFloat(v);
      }
      rows.sort(function (a, b) {
        var x = key(a), y = key(b), order;
        if (typeof x === "number" && typeof y === "number") {
          order = (isNaN(x) - isNaN(y)) || (isNaN(x) ? 0 : x - y);
        } else { order = String(x).localeCompare(String(y)); }
        return up ? order : -order;
      });
      rows.forEach(function (row) { body.appendChild(row); });
    });
  });
});
