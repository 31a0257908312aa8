// steelyard report behaviour: draw the charts, filter the findings. The page reads fully
// without it; nothing here fetches anything.
(function () {
  "use strict";
  document.documentElement.classList.add("js");
  var embed = window.steelyardEmbed;
  document.querySelectorAll("[data-chart]").forEach(function (node) {
    var source = document.getElementById(node.getAttribute("data-chart"));
    if (!embed || !source) { return; }
    var spec = JSON.parse(source.textContent);
    embed(node, spec, {
      renderer: "svg",
      actions: { export: true, source: false, compiled: false, editor: false },
      tooltip: { theme: "light" }
    }).then(function () { node.setAttribute("data-drawn", "yes"); })
      .catch(function (error) { node.textContent = "This chart could not be drawn: " + error; node.setAttribute("data-drawn", "failed"); });
  });
  document.querySelectorAll("form.filters").forEach(function (form) {
    var table = document.getElementById(form.getAttribute("data-table"));
    var counter = form.querySelector(".shown-count");
    function apply() {
      var severities = {};
      form.querySelectorAll("input[name=severity]").forEach(function (box) { severities[box.value] = box.checked; });
      var rule = form.querySelector("select[name=rule]").value;
      var text = form.querySelector("input[name=text]").value.toLowerCase();
      var shown = 0, rows = table.querySelectorAll("tbody tr.finding");
      rows.forEach(function (row) {
        var keep = severities[row.getAttribute("data-severity")] !== false &&
          (rule === "" || row.getAttribute("data-rule") === rule) &&
          (text === "" || row.textContent.toLowerCase().indexOf(text) >= 0);
        row.hidden = !keep;
        if (keep) { shown += 1; }
      });
      counter.textContent = shown + " of " + rows.length + " shown";
    }
    form.addEventListener("input", apply);
    form.addEventListener("submit", function (event) { event.preventDefault(); });
    apply();
  });
})();
