// Sort a table by clicking a column header (numbers as numbers, empty cells last); filter the rows
// of a long table by typing in the box above it. Offline: nothing is fetched.
(function () {
  "use strict";
  function cellText(row, index) {
    var cell = row.cells[index];
    return cell ? cell.textContent.trim() : "";
  }
  function compare(x, y) {
    if (x === "" || y === "") { return (x === "") - (y === ""); }
    var nx = Number(x), ny = Number(y);
    if (!isNaN(nx) && !isNaN(ny)) { return nx - ny; }
    return x.localeCompare(y);
  }
  function sortable(table, body) {
    var head = table.tHead;
    if (!head || !head.rows.length) { return; }
    Array.prototype.forEach.call(head.rows[head.rows.length - 1].cells, function (header, index) {
      header.className += " sortable";
      header.title = "click to sort";
      header.addEventListener("click", function () {
        var ascending = header.getAttribute("data-order") !== "ascending";
        header.setAttribute("data-order", ascending ? "ascending" : "descending");
        var rows = Array.prototype.slice.call(body.rows);
        rows.sort(function (a, b) {
          var x = cellText(a, index), y = cellText(b, index);
          if (x === "" || y === "") { return compare(x, y); }
          return ascending ? compare(x, y) : compare(y, x);
        });
        rows.forEach(function (row) { body.appendChild(row); });
      });
    });
  }
  function filterable(table, body) {
    if (body.rows.length < 10) { return; }
    var box = document.createElement("input");
    box.type = "search";
    box.className = "filter";
    box.placeholder = "filter rows";
    box.addEventListener("input", function () {
      var text = box.value.toLowerCase();
      Array.prototype.forEach.call(body.rows, function (row) {
        row.style.display = row.textContent.toLowerCase().indexOf(text) >= 0 ? "" : "none";
      });
    });
    table.parentNode.insertBefore(box, table);
  }
  Array.prototype.forEach.call(document.querySelectorAll("table"), function (table) {
    var body = table.tBodies[0];
    if (!body) { return; }
    sortable(table, body);
    filterable(table, body);
  });
})();
