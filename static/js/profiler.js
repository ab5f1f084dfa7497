// Profiler: redraw the traces and the point's numbers as a setting is typed or dragged.
// The chart is embedded once; new rows replace the named dataset "traces".
(function () {
  "use strict";
  var form = document.getElementById("profiler-form");
  var figure = document.getElementById("profiler-chart");
  if (!form || !figure || !window.vegaEmbed) { return; }
  var spec = JSON.parse(document.getElementById("profiler-spec").textContent);
  var problem = document.getElementById("profiler-problem");
  var state = { view: null, requests: 0, answered: 0 };
  window.plumblineProfiler = state;
  var pending = null;

  function fmt(v) {
    if (v === null || v === undefined) { return "—"; }
    return Number(v.toPrecision(4)).toString();
  }

  function cell(name, text) {
    document.querySelector('#profiler-point [data-cell="' + name + '"]').textContent = text;
  }

  function show(body) {
    var p = body.point;
    cell("predicted", fmt(p.predicted));
    cell("ci", fmt(p.ci[0]) + " to " + fmt(p.ci[1]));
    cell("pi", fmt(p.pi[0]) + " to " + fmt(p.pi[1]));
    cell("inside", p.inside_design_region ? "inside" : "outside: the model is extrapolating");
    (body.levels || []).forEach(function (c) {
      var table = document.querySelector('table[data-levels="' + CSS.escape(c.factor) + '"]');
      if (!table) { return; }
      table.querySelectorAll("tbody tr").forEach(function (tr, i) {
        var q = c.points[i];
        tr.children[1].textContent = fmt(q.predicted);
        tr.children[2].textContent = fmt(q.ci[0]) + " to " + fmt(q.ci[1]);
      });
    });
    state.answered += 1;
    var answered = String(state.answered);
    form.dataset.answered = answered;
    if (state.view) {
      var change = window.vega.changeset().remove(function () { return true; }).insert(body.rows);
      state.view.change("traces", change).runAsync().then(function () {
        form.dataset.drawn = answered;
      });
    }
  }

  function ask() {
    var query = new URLSearchParams(new FormData(form)).toString();
    state.requests += 1;
    fetch(form.dataset.numbersUrl + "?" + query, { credentials: "same-origin",
                                                   headers: { Accept: "application/json" } })
      .then(function (response) {
        return response.json().then(function (body) {
          if (!response.ok) { throw new Error(body.error || ("answered " + response.status)); }
          return body;
        });
      })
      .then(function (body) { problem.hidden = true; show(body); })
      .catch(function (err) { problem.textContent = err.message; problem.hidden = false; });
    if (window.history && window.history.replaceState) {
      window.history.replaceState(null, "", form.action + "?" + query);
    }
  }

  function soon() {
    if (pending) { window.clearTimeout(pending); }
    pending = window.setTimeout(ask, 120);
  }

  form.querySelectorAll("input[data-slider]").forEach(function (slider) {
    var box = form.querySelector('input[data-factor="' + CSS.escape(slider.dataset.slider) + '"]');
    slider.addEventListener("input", function () {
      box.value = String(Number(Number(slider.value).toPrecision(4)));
      soon();
    });
    box.addEventListener("input", function () {
      if (box.value !== "" && !isNaN(Number(box.value))) { slider.value = box.value; soon(); }
    });
  });
  form.querySelectorAll("select[data-level]").forEach(function (select) {
    select.addEventListener("change", ask);
  });
  form.addEventListener("submit", function (event) { event.preventDefault(); ask(); });

  window.vegaEmbed(figure.querySelector(".chart-canvas"), spec, {
    renderer: "svg", actions: false, defaultStyle: false, ast: true,
    expr: window.vegaInterpreter.expressionInterpreter
  }).then(function (result) {
    state.view = result.view;
    figure.classList.add("rendered");
  }).catch(function (err) {
    figure.querySelector(".chart-canvas").textContent = "The chart could not be drawn: " + err.message;
  });
})();
