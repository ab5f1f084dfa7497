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

  // Each response's block shows only the fields and words its goal uses; hidden fields are
  // also disabled so a value typed for another goal is not sent. Without the script every
  // field shows and the server says which one does not fit the goal.
  function showFields(select) {
    var block = select.closest("fieldset");
    if (!block) { return; }
    var goal = select.value;
    block.querySelectorAll("[data-goal-field]").forEach(function (part) {
      var used = part.dataset.goalField.split(" ").indexOf(goal) !== -1;
      part.hidden = !used;
      part.querySelectorAll("input").forEach(function (input) { input.disabled = !used; });
    });
    block.querySelectorAll("[data-goal-generic]").forEach(function (words) {
      words.hidden = true;
    });
    block.querySelectorAll("[data-goal-words]").forEach(function (words) {
      words.hidden = words.dataset.goalWords.split(" ").indexOf(goal) === -1;
    });
  }
  document.querySelectorAll("select[data-goal]").forEach(function (select) {
    showFields(select);
    select.addEventListener("change", function () { showFields(select); });
  });
})();
