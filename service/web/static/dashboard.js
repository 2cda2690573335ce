// toposcout dashboard: keeps the study list and a study page current by polling the JSON API.
// No external requests; no framework. Text is inserted with textContent, never as HTML,
// except the study page's live part, which is server-rendered HTML of this same site.
(function () {
  "use strict";
  var FINAL = { done: true, failed: true, cancelled: true };

  function getJSON(url) {
    return fetch(url, { headers: { Accept: "application/json" }, credentials: "same-origin" })
      .then(function (r) { if (!r.ok) { throw new Error("HTTP " + r.status); } return r.json(); });
  }

  function when(iso) {
    var d = new Date(iso);
    if (isNaN(d.getTime())) { return iso || "\u2013"; }
    function p(n) { return (n < 10 ? "0" : "") + n; }
    return d.getUTCFullYear() + "-" + p(d.getUTCMonth() + 1) + "-" + p(d.getUTCDate()) + " " +
      p(d.getUTCHours()) + ":" + p(d.getUTCMinutes()) + " UTC";
  }

  function el(tag, attrs, text) {
    var e = document.createElement(tag);
    Object.keys(attrs || {}).forEach(function (k) { e.setAttribute(k, attrs[k]); });
    if (text !== undefined) { e.textContent = text; }
    return e;
  }

  // --- the study list ---------------------------------------------------------------
  function studyRow(s, ticked) {
    var tr = el("tr", { "data-id": s.id });
    var pick = el("td");
    var box = el("input", { type: "checkbox", name: "ids", value: s.id, id: "pick-" + s.id,
      "aria-label": "compare " + (s.label || s.model_name) });
    box.checked = !!ticked;
    pick.appendChild(box); tr.appendChild(pick);
    tr.appendChild(el("td", {}, s.label || ""));
    var name = el("td"); name.appendChild(el("a", { href: "/studies/" + s.id }, s.model_name)); tr.appendChild(name);
    tr.appendChild(el("td", {}, (s.connectivities || []).join(", ")));
    tr.appendChild(el("td", {}, (s.profiles || []).join(", ") || "\u2013"));
    tr.appendChild(el("td", {}, (s.noise_scales || []).join(", ")));
    var st = el("td"); st.appendChild(el("span", { "class": "status status-" + s.status }, s.status)); tr.appendChild(st);
    var pr = el("td");
    pr.appendChild(el("progress", { max: String(s.progress.total || 1), value: String(s.progress.done),
      "aria-label": "rows done for " + s.model_name }));
    pr.appendChild(document.createTextNode(" "));
    pr.appendChild(el("span", { "class": "count" }, s.progress.done + "/" + s.progress.total));
    tr.appendChild(pr);
    tr.appendChild(el("td", {}, s.owner));
    tr.appendChild(el("td", {}, when(s.created_at)));
    tr.appendChild(el("td", {}, s.best_connectivity || "\u2013"));
    return tr;
  }

  function pollList(table) {
    var url = table.getAttribute("data-api");
    var total = document.getElementById("studies-total");
    function tick() {
      if (document.visibilityState === "hidden") { return schedule(); }
      getJSON(url).then(function (data) {
        var body = table.tBodies[0];
        if (data.items.length) {
          var known = {};  // best connectivity shown by the server-rendered page, if the list lacks it
          var ticked = {};  // studies ticked for comparison stay ticked
          Array.prototype.forEach.call(body.rows, function (tr) {
            var id = tr.getAttribute("data-id");
            if (id && tr.cells.length > 10) { known[id] = tr.cells[10].textContent; }
            var box = tr.querySelector("input[type=checkbox]");
            if (id && box && box.checked) { ticked[id] = true; }
          });
          var rows = document.createDocumentFragment();
          data.items.forEach(function (s) {
            if (s.best_connectivity === undefined && known[s.id] && known[s.id] !== "\u2013") {
              s.best_connectivity = known[s.id];
            }
            rows.appendChild(studyRow(s, ticked[s.id]));
          });
          body.replaceChildren(rows);
        }
        if (total) { total.textContent = data.total + (data.total === 1 ? " study" : " studies"); }
      }).catch(function () { /* keep the last good view; try again */ }).then(schedule);
    }
    function schedule() { window.setTimeout(tick, 2000); }
    schedule();
  }

  // --- a study page ------------------------------------------------------------------
  function pollStudy(live) {
    var id = live.getAttribute("data-study");
    // start from what the server rendered, so a change before the first poll still refreshes the page
    var bar0 = document.getElementById("study-progress"), status0 = document.getElementById("study-status");
    var lastDone = bar0 ? Number(bar0.getAttribute("value")) : -1;
    var lastStatus = status0 ? status0.textContent.trim() : null;
    function refreshLive() {
      return fetch("/studies/" + id + "/live", { credentials: "same-origin" })
        .then(function (r) { if (!r.ok) { throw new Error("HTTP " + r.status); } return r.text(); })
        .then(function (html) {
          var doc = new DOMParser().parseFromString(html, "text/html");
          var fresh = doc.getElementById("live-fragment") || doc.body;
          live.replaceChildren.apply(live, Array.prototype.slice.call(fresh.childNodes).map(function (n) {
            return document.importNode(n, true);
          }));
        });
    }
    function tick() {
      getJSON("/v1/studies/" + id).then(function (s) {
        var bar = document.getElementById("study-progress");
        var count = document.getElementById("study-count");
        var status = document.getElementById("study-status");
        if (bar) { bar.max = s.progress.total || 1; bar.value = s.progress.done; }
        if (count) { count.textContent = s.progress.done + "/" + s.progress.total; }
        if (status) { status.textContent = s.status; status.className = "status status-" + s.status; }
        var changed = s.progress.done !== lastDone || s.status !== lastStatus;
        lastDone = s.progress.done; lastStatus = s.status;
        var next = changed ? refreshLive() : Promise.resolve();
        return next.then(function () {
          if (FINAL[s.status]) { live.setAttribute("data-final", "true"); return; }
          window.setTimeout(tick, 1000);
        });
      }).catch(function () { window.setTimeout(tick, 3000); });
    }
    tick();
  }

  document.addEventListener("DOMContentLoaded", function () {
    var table = document.getElementById("studies");
    if (table) { pollList(table); }
    var live = document.getElementById("live");
    if (live && live.getAttribute("data-final") !== "true") { pollStudy(live); }
  });
})();
