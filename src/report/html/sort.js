// Sorting of the report's tables by a click on a header. The page reads the same without it:
// the tables come sorted, and the buttons exist only when this script runs.
function gradauditKey(cell) {
  var v = cell.getAttribute("data-v");
  if (v === null) return cell.textContent.trim();
  return v === "" ? Infinity : Number(v);
}
document.querySelectorAll("table.sortable").forEach(function (table) {
  var heads = table.querySelectorAll("thead th");
  heads.forEach(function (th, col) {
    var b = document.createElement("button");
    b.type = "button";
    b.textContent = th.textContent;
    th.textContent = "";
    th.appendChild(b);
    b.addEventListener("click", function () {
      var up = th.getAttribute("aria-sort") !== "ascending";
      heads.forEach(function (h) { h.removeAttribute("aria-sort"); });
      th.setAttribute("aria-sort", up ? "ascending" : "descending");
      var rows = Array.prototype.slice.call(table.tBodies[0].rows);
      rows.sort(function (a, b) {
        var x = gradauditKey(a.cells[col]), y = gradauditKey(b.cells[col]);
        var d = typeof x === "number" ? (x === y ? 0 : (x > y ? 1 : -1)) : String(x).localeCompare(String(y));
        return up ? d : -d;
      });
      rows.forEach(function (r) { table.tBodies[0].appendChild(r); });
    });
  });
  table.setAttribute("data-sortable", "ready");
});
