/* Evidence panel: slice viewer, effective-rate calculator, copy button.
   Loaded with defer from templates/evidence/panel.html; no inline scripts (CSP). */
(function () {
  "use strict";

  function fmt(x) {
    if (typeof x !== "number" || !isFinite(x)) { return "?"; }
    return (Math.round(x * 100) / 100).toString();
  }

  function setupViewer(root) {
    var base = root.getAttribute("data-base");
    var n = parseInt(root.getAttribute("data-n"), 10) || 0;
    var indices = (root.getAttribute("data-indices") || "").split(",");
    var range = root.querySelector(".ev-range");
    var img = root.querySelector(".ev-slice-image");
    var spec = root.querySelector(".ev-slice-spectrum");
    var out = root.querySelector(".ev-pos");
    if (!range || !img || !spec || n < 1) { return; }
    function show(i) {
      i = Math.max(0, Math.min(n - 1, i));
      range.value = String(i);
      img.src = base + "/images/" + i + ".png";
      spec.src = base + "/spectra/" + i + ".png";
      var frame = indices[i] !== undefined ? indices[i] : String(i);
      img.alt = "Image of frame " + frame;
      spec.alt = "Log-power spectrum of frame " + frame;
      if (out) { out.textContent = "frame " + frame + " (" + (i + 1) + " of " + n + ")"; }
    }
    range.addEventListener("input", function () { show(parseInt(range.value, 10)); });
    root.querySelectorAll(".ev-step").forEach(function (b) {
      b.addEventListener("click", function () {
        show(parseInt(range.value, 10) + parseInt(b.getAttribute("data-step"), 10));
      });
    });
    root.addEventListener("wheel", function (e) {
      if (!e.target.closest || !e.target.closest(".ev-pair")) { return; }
      e.preventDefault();
      show(parseInt(range.value, 10) + (e.deltaY > 0 ? 1 : -1));
    }, { passive: false });
    if (n < 2) {
      root.querySelectorAll(".ev-step, .ev-range").forEach(function (el) { el.disabled = true; });
    }
  }

  function setupCalculator(form) {
    var out = form.querySelector(".ev-calc-out");
    var err = form.querySelector(".ev-calc-error");
    var chart = form.querySelector(".ev-calc-chart");
    var chartUrl = form.getAttribute("data-chart");
    var last = "";
    function run(e) {
      if (e) { e.preventDefault(); }
      var params = new URLSearchParams(new FormData(form));
      var query = params.toString();
      if (query === last && e && e.type !== "submit") { return; }
      last = query;
      err.hidden = true;
      out.textContent = "Calculating\u2026";
      fetch(form.getAttribute("action") + "?" + query, {
        credentials: "same-origin", headers: { "Accept": "application/json" }
      }).then(function (r) {
        return r.json().then(function (body) { return { ok: r.ok, body: body }; });
      }).then(function (res) {
        if (!res.ok) {
          out.textContent = "";
          err.textContent = (res.body && res.body.error && res.body.error.message) ||
            "The calculator could not answer.";
          err.hidden = false;
          return;
        }
        var b = res.body;
        out.textContent = "";
        out.appendChild(document.createTextNode("Nominal R = " + fmt(b.acceleration) +
          ": on the acquired support the effective acceleration is "));
        var strong = document.createElement("strong");
        strong.className = "ev-calc-value";
        strong.textContent = "R_eff = " + fmt(b.effective_acceleration);
        out.appendChild(strong);
        out.appendChild(document.createTextNode(
          " (a raw acquisition of the same grid: " + fmt(b.raw_effective_acceleration) + ")."));
        if (chart && chartUrl) { chart.src = chartUrl + "?" + query; }
      }).catch(function () {
        out.textContent = "";
        err.textContent = "The server did not answer; check that rawproof serve is running.";
        err.hidden = false;
      });
    }
    form.addEventListener("submit", run);
    form.querySelectorAll("select").forEach(function (s) { s.addEventListener("change", run); });
  }

  function setupCopy(button) {
    var target = document.getElementById(button.getAttribute("data-target"));
    var note = button.parentNode.querySelector(".ev-copied");
    if (!target) { return; }
    button.addEventListener("click", function () {
      var text = target.textContent.trim();
      function done(ok) {
        if (note) { note.textContent = ok ? "Copied." : "Select the text and copy it by hand."; }
      }
      if (navigator.clipboard && window.isSecureContext) {
        navigator.clipboard.writeText(text).then(function () { done(true); },
          function () { done(fallback()); });
      } else {
        done(fallback());
      }
      function fallback() {
        var sel = window.getSelection();
        var range = document.createRange();
        range.selectNodeContents(target);
        sel.removeAllRanges();
        sel.addRange(range);
        var ok = false;
        try { ok = document.execCommand("copy"); } catch (e) { ok = false; }
        return ok;
      }
    });
  }

  function init() {
    document.querySelectorAll(".ev-viewer").forEach(setupViewer);
    document.querySelectorAll("form.ev-calc").forEach(setupCalculator);
    document.querySelectorAll(".ev-copy").forEach(setupCopy);
  }
  if (document.readyState === "loading") {
    document.addEventListener("DOMContentLoaded", init);
  } else {
    init();
  }
})();
