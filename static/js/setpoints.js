// Setpoint pages: draw the design-space map from the Vega-Lite spec in a JSON data block
// (SVG, expression interpreter, no eval), and show goal fields only where the goal uses them.
(function () {
  "use strict";
  var data = document.getElementById("design-space-spec");
  var target = document.getElementById("design-space-chart");
  if (data && target && window.vegaEmbed) {
    window.vegaEmbed(target, JSON.parse(data.textContent), {
      renderer: "svg", actions: false, defaultStyle: false, ast: true,
      expr: window.vegaInterpreter.expressionInterpreter
    }).then(function () {
      target.classList.add("rendered");
    }).catch(function (err) {
      target.textContent = "The map could not be drawn: " + err.message;
    });
  }

  function showFields(select) {
    var row = select.closest("tr");
    if (!row) { return; }
    var goal = select.value;
    row.querySelectorAll("[data-goal-field]").forEach(function (input) {
      var uses = input.dataset.goalField.split(" ");
      input.disabled = uses.indexOf(goal) === -1;
    });
  }
  document.querySelectorAll("select[data-goal]").forEach(function (select) {
    showFields(select);
    select.addEventListener("change", function () { showFields(select); });
  });
})();
