// Fit charts: embed each Vega-Lite spec (SVG, expression interpreter, no eval) and keep one
// highlighted run across all of them. Each run-based spec carries a point selection "pick"
// keyed on "row" and a variable "highlight_row"; a click in one view sets it in every view.
(function () {
  "use strict";
  var grid = document.getElementById("chart-grid");
  if (!grid || !window.vegaEmbed) { return; }
  var views = {};
  var state = { highlighted: 0, rendered: [] };
  window.plumblineCharts = state;

  function hasSignal(view, name) {
    try { view.signal(name); return true; } catch (e) { return false; }
  }

  function rowOf(value) {
    // A point selection on ["row"] resolves to {row: [n]} (empty object when cleared).
    if (!value || value.row === undefined) { return 0; }
    var row = Array.isArray(value.row) ? value.row[0] : value.row;
    return typeof row === "number" ? row : 0;
  }

  function highlight(row) {
    state.highlighted = row;
    Object.keys(views).forEach(function (name) {
      var view = views[name];
      if (hasSignal(view, "highlight_row") && view.signal("highlight_row") !== row) {
        view.signal("highlight_row", row).runAsync();
      }
    });
    document.querySelectorAll("table.runs tr[data-row]").forEach(function (tr) {
      tr.classList.toggle("highlighted", Number(tr.dataset.row) === row);
    });
  }
  state.highlight = highlight;

  function embed(chart) {
    var figure = grid.querySelector('figure[data-chart="' + CSS.escape(chart.name) + '"]');
    if (!figure) { return Promise.resolve(); }
    var target = figure.querySelector(".chart-canvas");
    // The figure's caption already names the chart; the spec keeps its title for JSON readers.
    var spec = Object.assign({}, chart.spec);
    delete spec.title;
    return window.vegaEmbed(target, spec, {
      renderer: "svg", actions: false, defaultStyle: false, ast: true,
      expr: window.vegaInterpreter.expressionInterpreter
    }).then(function (result) {
      views[chart.name] = result.view;
      // "pick" on the fitted runs, "pick_left_out" on the runs left out of the fit
      ["pick", "pick_left_out"].forEach(function (name) {
        if (hasSignal(result.view, name)) {
          result.view.addSignalListener(name, function (_name, value) {
            highlight(rowOf(value));
          });
        }
      });
      state.rendered.push(chart.name);
      figure.classList.add("rendered");
    }).catch(function (err) {
      target.textContent = "This chart could not be drawn: " + err.message;
      figure.classList.add("failed");
    });
  }

  fetch(grid.dataset.chartsUrl, { credentials: "same-origin", headers: { Accept: "application/json" } })
    .then(function (response) {
      if (!response.ok) { throw new Error("charts answered " + response.status); }
      return response.json();
    })
    .then(function (body) { return Promise.all(body.charts.map(embed)); })
    .then(function () { grid.classList.add("all-rendered"); })
    .catch(function (err) {
      grid.insertAdjacentHTML("afterbegin", '<p class="problem"></p>');
      grid.firstChild.textContent = "The charts could not be loaded: " + err.message;
    });
})();
