// Upload form: sends the metadata and files with one streamed request, shows
// progress, then opens the new dataset's page. Without JavaScript the form
// posts the same multipart body natively.
(function () {
  "use strict";
  var form = document.getElementById("upload-form");
  if (!form) { return; }
  var inputs = [document.getElementById("f-files"), document.getElementById("f-folder")];
  var summary = document.getElementById("file-summary");
  var statusBox = document.getElementById("upload-status");
  var bar = document.getElementById("upload-progress");
  var percent = document.getElementById("upload-percent");
  var errorBox = document.getElementById("upload-error");
  var submit = document.getElementById("upload-submit");
  var maxBytes = Number(form.getAttribute("data-max-bytes")) || Infinity;
  var fieldNames = ["csrf_token", "name", "source", "licence", "description", "intended_use"];

  function chosenFiles() {
    var out = [];
    inputs.forEach(function (input) {
      if (!input) { return; }
      for (var i = 0; i < input.files.length; i++) { out.push(input.files[i]); }
    });
    return out;
  }

  function human(n) {
    var units = ["B", "KiB", "MiB", "GiB", "TiB"];
    var i = 0;
    while (n >= 1024 && i < units.length - 1) { n /= 1024; i++; }
    return (i === 0 ? n : n.toFixed(1)) + " " + units[i];
  }

  function showError(message) {
    errorBox.textContent = message;
    errorBox.hidden = false;
    errorBox.scrollIntoView({ block: "center" });
    errorBox.focus({ preventScroll: true });
  }

  function describe() {
    var files = chosenFiles();
    if (!files.length) { summary.textContent = "No files chosen."; return; }
    var total = files.reduce(function (s, f) { return s + f.size; }, 0);
    var text = files.length + " file" + (files.length === 1 ? "" : "s") + ", " + human(total);
    if (files.length === 1 && /\.zip$/i.test(files[0].name)) { text += " (one zip archive)"; }
    if (total > maxBytes) { text += " — over the limit of " + human(maxBytes); }
    summary.textContent = text;
  }

  inputs.forEach(function (input) { if (input) { input.addEventListener("change", describe); } });

  form.addEventListener("submit", function (event) {
    event.preventDefault();
    errorBox.hidden = true;
    var files = chosenFiles();
    if (!files.length) { showError("Choose at least one file, a folder or a zip archive."); return; }
    var total = files.reduce(function (s, f) { return s + f.size; }, 0);
    if (total > maxBytes) { showError("The files add up to " + human(total) + ", over the limit of " + human(maxBytes) + "."); return; }
    var data = new FormData();
    fieldNames.forEach(function (name) {
      var el = form.elements.namedItem(name);
      data.append(name, el ? el.value : "");
    });
    files.forEach(function (file) {
      data.append("relpath", file.webkitRelativePath || file.name);
      data.append("files", file, file.name);
    });
    var xhr = new XMLHttpRequest();
    xhr.open("POST", form.getAttribute("action"));
    xhr.setRequestHeader("Accept", "application/json");
    xhr.setRequestHeader("X-CSRF-Token", form.elements.namedItem("csrf_token").value);
    xhr.upload.addEventListener("progress", function (e) {
      if (e.lengthComputable) {
        bar.max = e.total;
        bar.value = e.loaded;
        percent.textContent = Math.floor(100 * e.loaded / e.total) + " % of " + human(e.total);
      }
    });
    xhr.addEventListener("load", function () {
      var body = null;
      try { body = JSON.parse(xhr.responseText); } catch (err) { body = null; }
      if (xhr.status === 201 && body && body.url) {
        percent.textContent = "Stored. Opening the dataset…";
        window.location.assign(body.url);
        return;
      }
      submit.disabled = false;
      statusBox.hidden = true;
      showError(body && body.error ? body.error.message : "The upload failed (HTTP " + xhr.status + ").");
    });
    xhr.addEventListener("error", function () {
      submit.disabled = false;
      statusBox.hidden = true;
      showError("The connection broke during the upload; nothing was stored. Try again.");
    });
    submit.disabled = true;
    statusBox.hidden = false;
    bar.value = 0;
    percent.textContent = "starting…";
    xhr.send(data);
  });
})();
