// Dataset page: while the analysis is queued or running, poll its status and
// show per-file progress; reload when it is done or has failed.
(function () {
  "use strict";
  var box = document.getElementById("analysis");
  if (!box) { return; }
  var url = box.getAttribute("data-status-url");
  var state = box.getAttribute("data-state");
  var status = document.getElementById("job-status");
  if (state !== "queued" && state !== "running") { return; }

  function render(job) {
    status.textContent = "";
    var p = document.createElement("p");
    var badge = document.createElement("span");
    badge.className = "state s-" + job.state;
    badge.textContent = job.state;
    p.appendChild(badge);
    if (job.attempts > 1) { p.appendChild(document.createTextNode(" · attempt " + job.attempts)); }
    status.appendChild(p);
    var prog = job.progress || {};
    var list = document.createElement("ul");
    list.className = "file-progress";
    list.id = "file-progress";
    (prog.files || []).forEach(function (f) {
      var li = document.createElement("li");
      var name = document.createElement("span");
      name.className = "fname";
      name.textContent = f.name;
      var bar = document.createElement("progress");
      bar.max = f.total || 1;
      bar.value = f.done;
      var count = document.createElement("span");
      count.className = "small";
      count.textContent = f.done + " / " + f.total;
      li.appendChild(name);
      li.appendChild(document.createTextNode(" "));
      li.appendChild(bar);
      li.appendChild(document.createTextNode(" "));
      li.appendChild(count);
      list.appendChild(li);
    });
    status.appendChild(list);
    var cur = document.createElement("p");
    cur.className = "muted small";
    cur.textContent = prog.current || "";
    status.appendChild(cur);
  }

  function poll() {
    fetch(url, { headers: { "Accept": "application/json" }, credentials: "same-origin" })
      .then(function (r) { return r.ok ? r.json() : null; })
      .then(function (data) {
        if (!data || !data.job) { window.setTimeout(poll, 3000); return; }
        if (data.job.state === "done" || data.job.state === "failed") {
          window.location.reload();
          return;
        }
        render(data.job);
        window.setTimeout(poll, 1200);
      })
      .catch(function () { window.setTimeout(poll, 3000); });
  }
  window.setTimeout(poll, 800);
})();
