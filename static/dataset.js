// Dataset page: while the analysis or the bias probe is queued or running, poll
// the status and show progress in place. The page never reloads itself: when the
// analysis finishes, a notice with a link to the new report appears (so a comment
// or a decision rationale being typed is never lost); a finished probe likewise
// offers a link to show its numbers.
(function () {
  "use strict";
  var box = document.getElementById("analysis");
  if (!box) { return; }
  var url = box.getAttribute("data-status-url");
  var state = box.getAttribute("data-state");
  var status = document.getElementById("job-status");
  var probeBox = document.getElementById("probe");
  var probeStatus = document.getElementById("probe-status");
  var probeState = probeBox ? probeBox.getAttribute("data-state") : "";
  var busy = function (s) { return s === "queued" || s === "running"; };
  var watchJob = busy(state);
  var watchProbe = busy(probeState);
  if (!watchJob && !watchProbe) { return; }

  function el(tag, cls, text) {
    var e = document.createElement(tag);
    if (cls) { e.className = cls; }
    if (text !== undefined) { e.textContent = text; }
    return e;
  }

  function readyNotice(target, id, text, href, linkText) {
    if (document.getElementById(id)) { return; }
    var p = el("p", "notice info ready-notice");
    p.id = id;
    p.setAttribute("role", "status");
    p.appendChild(document.createTextNode(text + " "));
    var a = el("a", "", linkText);
    a.href = href;
    p.appendChild(a);
    p.appendChild(document.createTextNode(" (anything you are typing on this page stays here until you follow the link)."));
    target.textContent = "";
    target.appendChild(p);
  }

  function renderJob(job) {
    status.textContent = "";
    var p = el("p");
    p.appendChild(el("span", "state s-" + job.state, job.state));
    if (job.attempts > 1) { p.appendChild(document.createTextNode(" · attempt " + job.attempts)); }
    status.appendChild(p);
    var prog = job.progress || {};
    var list = el("ul", "file-progress");
    list.id = "file-progress";
    (prog.files || []).forEach(function (f) {
      var li = el("li");
      li.appendChild(el("span", "fname", f.name));
      li.appendChild(document.createTextNode(" "));
      var bar = el("progress");
      bar.max = f.total || 1;
      bar.value = f.done;
      li.appendChild(bar);
      li.appendChild(document.createTextNode(" "));
      li.appendChild(el("span", "small", f.done + " / " + f.total));
      list.appendChild(li);
    });
    status.appendChild(list);
    status.appendChild(el("p", "muted small", prog.current || ""));
  }

  // Why the queue waits (the server reads the workers' status files); hidden when it moves.
  function renderQueue(q) {
    var notice = document.getElementById("queue-stalled");
    if (!notice) { return; }
    var stalled = !!(q && q.stalled);
    notice.hidden = !stalled;
    notice.setAttribute("data-reason", stalled ? q.reason : "");
    document.getElementById("queue-message").textContent = stalled ? q.message : "";
    var since = stalled && q.since ? "; since " + q.since.replace("T", " ").replace("Z", " UTC") : "";
    document.getElementById("queue-pending").textContent = stalled ?
      q.pending + (q.pending === 1 ? " analysis" : " analyses") + " queued or running" + since + "." : "";
  }

  function renderProbe(run) {
    probeStatus.textContent = "";
    var p = el("p");
    p.appendChild(el("span", "state s-" + run.state, run.state));
    p.appendChild(document.createTextNode(" R = " + run.acceleration + ", " + run.family +
                                          ", " + run.slices + " slices"));
    probeStatus.appendChild(p);
    var prog = run.progress || {};
    var q = el("p");
    var bar = el("progress");
    bar.max = 1;
    bar.value = prog.fraction || 0;
    q.appendChild(bar);
    q.appendChild(document.createTextNode(" "));
    q.appendChild(el("span", "muted small", prog.text || ""));
    probeStatus.appendChild(q);
  }

  function poll() {
    fetch(url, { headers: { "Accept": "application/json" }, credentials: "same-origin" })
      .then(function (r) { return r.ok ? r.json() : null; })
      .then(function (data) {
        if (!data) { window.setTimeout(poll, 3000); return; }
        var job = data.job;
        renderQueue(data.queue);
        if (watchJob && job) {
          if (job.state === "done") {
            watchJob = false;
            readyNotice(status, "report-ready", "The analysis has finished.",
                        window.location.pathname + "?ready=" + (job.report_id || "") + "#answer", "Show the report");
          } else if (job.state === "failed") {
            watchJob = false;
            readyNotice(status, "report-ready", "The analysis failed.",
                        window.location.pathname + "?ready=failed#analysis", "Show why");
          } else {
            renderJob(job);
          }
        }
        var run = data.probe;
        if (watchProbe && run && probeStatus) {
          if (run.state === "done" || run.state === "failed") {
            watchProbe = false;
            readyNotice(probeStatus, "probe-ready",
                        run.state === "done" ? "The bias probe has finished." : "The bias probe failed.",
                        window.location.pathname + "?probe=" + run.id + "#probe",
                        run.state === "done" ? "Show its numbers" : "Show why");
          } else {
            renderProbe(run);
          }
        }
        if (watchJob || watchProbe) { window.setTimeout(poll, 1200); }
      })
      .catch(function () { window.setTimeout(poll, 3000); });
  }
  window.setTimeout(poll, 800);
})();
