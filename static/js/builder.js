// Model builder: named model or term picker, hierarchy shown and kept, reasons required.
(function () {
  "use strict";
  var form = document.getElementById("builder");
  if (!form) { return; }
  var terms = JSON.parse(document.getElementById("term-data").textContent);
  var parentsOf = {};
  terms.forEach(function (t) { parentsOf[t.name] = t.parents; });
  var hierarchy = document.getElementById("f-hierarchy");

  function box(name) {
    return form.querySelector('input[name="terms"][value="' + CSS.escape(name) + '"]');
  }

  // Every ancestor a chosen term needs, with the chosen terms that need it.
  function neededBy() {
    var need = {};
    function walk(name, by) {
      (parentsOf[name] || []).forEach(function (p) {
        (need[p] = need[p] || {})[by] = true;
        walk(p, by);
      });
    }
    form.querySelectorAll('input[name="terms"]').forEach(function (el) {
      if (el.checked && !el.dataset.auto) { walk(el.value, el.value); }
    });
    return need;
  }

  function refreshTerms() {
    var need = hierarchy.checked ? neededBy() : {};
    form.querySelectorAll("label.term").forEach(function (label) {
      var el = label.querySelector("input");
      var note = label.querySelector(".needed");
      var by = need[el.value] ? Object.keys(need[el.value]) : [];
      if (by.length) {
        if (!el.checked) { el.checked = true; el.dataset.auto = "1"; }
        note.textContent = "needed by " + by.join(", ");
        label.classList.add("kept");
      } else {
        if (el.dataset.auto) { el.checked = false; delete el.dataset.auto; }
        note.textContent = "";
        label.classList.remove("kept");
      }
    });
  }

  form.addEventListener("click", function (event) {
    var el = event.target;
    if (el.name !== "terms" || !hierarchy.checked) { return; }
    var need = neededBy();
    if (!el.checked && need[el.value]) {
      // A parent that a chosen term needs stays while hierarchy is on.
      event.preventDefault();
      el.closest("label").classList.add("refused");
      setTimeout(function () { el.closest("label").classList.remove("refused"); }, 600);
    }
  });
  form.addEventListener("change", function (event) {
    var el = event.target;
    if (el.name === "terms") { delete el.dataset.auto; refreshTerms(); }
    if (el === hierarchy) { refreshTerms(); }
    if (el.name === "mode") { showMode(); }
    if (el.name === "transform") { showLambda(); }
    if (el.name === "exclude") { markExclusion(el); }
  });

  function showMode() {
    var picked = form.querySelector('input[name="mode"]:checked').value;
    document.getElementById("named-model").hidden = picked !== "named";
    document.getElementById("term-picker").hidden = picked !== "terms";
  }

  function showLambda() {
    document.getElementById("lambda-field").hidden =
      document.getElementById("f-transform").value !== "boxcox";
  }

  function markExclusion(el, initial) {
    var reason = form.querySelector('input[name="reason_' + el.value + '"]');
    reason.required = el.checked;
    el.closest("tr").classList.toggle("excluded", el.checked);
    if (el.checked && initial !== true) { reason.focus(); }
  }

  // Start from the named model's terms when switching to the picker with nothing picked.
  form.querySelectorAll('input[name="mode"]').forEach(function (radio) {
    radio.addEventListener("change", function () {
      if (radio.value !== "terms" || form.querySelector('input[name="terms"]:checked')) { return; }
      var model = document.getElementById("f-model").value;
      terms.forEach(function (t) {
        var keep = t.kind === "main" || (t.kind === "interaction" && t.parents.length === 2 &&
          (model === "interaction" || model === "quadratic")) ||
          (t.kind === "square" && model === "quadratic") ||
          (t.kind === "interaction" && model === "full");
        if (keep) { box(t.name).checked = true; }
      });
      refreshTerms();
    });
  });

  form.querySelectorAll('input[name="exclude"]').forEach(function (el) { markExclusion(el, true); });
  showMode();
  showLambda();
  refreshTerms();
})();
