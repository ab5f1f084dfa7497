// Upload with a progress bar; falls back to a plain form post when XHR is unavailable.
(function () {
  "use strict";
  var form = document.getElementById("upload-form");
  if (!form || !window.XMLHttpRequest || !window.FormData) { return; }
  var bar = document.getElementById("upload-progress");
  var status = document.getElementById("upload-status");
  form.addEventListener("submit", function (event) {
    event.preventDefault();
    var xhr = new XMLHttpRequest();
    xhr.open("POST", form.action);
    bar.hidden = false;
    xhr.upload.addEventListener("progress", function (e) {
      if (e.lengthComputable) {
        bar.value = Math.round((100 * e.loaded) / e.total);
        status.textContent = "Sending… " + bar.value + " %";
      }
    });
    xhr.addEventListener("load", function () {
      if (xhr.status === 200 && xhr.responseURL && xhr.responseURL !== form.action) {
        window.location.assign(xhr.responseURL);
        return;
      }
      document.open();
      document.write(xhr.responseText);
      document.close();
    });
    xhr.addEventListener("error", function () {
      status.textContent = "The upload failed (network error). Try again.";
    });
    status.textContent = "Sending…";
    xhr.send(new FormData(form));
  });
})();
