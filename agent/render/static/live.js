// halfcycle live page: refresh the "Units now" table from its JSON twin, without a reload.
"use strict";
(function () {
  var marker = document.getElementById("refresh");
  var table = document.getElementById("now");
  if (!marker || !table) { return; }
  var src = marker.getAttribute("data-src");
  var every = parseInt(marker.getAttribute("data-poll-ms"), 10) || 10000;
  var fmt = new Intl.DateTimeFormat("en-CA", {
    timeZone: marker.getAttribute("data-tz") || "UTC", year: "numeric", month: "2-digit",
    day: "2-digit", hour: "2-digit", minute: "2-digit", second: "2-digit", hour12: false,
    timeZoneName: "short"
  });
  function time(t) {
    var el = document.createElement("time");
    if (typeof t !== "number") { el.textContent = "–"; return el; }
    var d = new Date(t * 1000);
    var iso = d.toISOString().replace(/\.\d+Z$/, "Z");
    el.setAttribute("datetime", iso);
    el.setAttribute("title", iso + " UTC");
    el.setAttribute("data-sort", t.toFixed(3));
    el.textContent = fmt.format(d).replace(",", "");
    return el;
  }
  function pill(state) {
    var s = document.createElement("span");
    s.className = "pill pill-" + state;
    s.textContent = state.replace(/_/g, " ");
    return s;
  }
  function cell(row, content, cls) {
    var td = row.insertCell();
    if (cls) { td.className = cls; }
    if (content instanceof Node) { td.appendChild(content); } else { td.textContent = content; }
    return td;
  }
  function render(data) {
    var body = table.tBodies[0];
    var rows = data.units.map(function (u) {
      var states = u.states || [];
      var top = states[0] || {};
      var tr = document.createElement("tr");
      tr.setAttribute("data-device", u.device);
      tr.className = "state-" + u.verdict;
      var a = document.createElement("a");
      a.href = "/units/" + encodeURIComponent(u.device);
      a.textContent = u.device;
      cell(tr, a);
      cell(tr, u.site);
      var st = cell(tr, pill(u.verdict), "state");
      states.slice(1).forEach(function (s) { st.appendChild(document.createTextNode(" ")); st.appendChild(pill(s.state)); });
      cell(tr, time(top.since), "since");
      cell(tr, top.reason || "", "reason");
      var ev = cell(tr, u.last_event ? u.last_event.category + " " : "–", "event");
      if (u.last_event) { ev.appendChild(time(u.last_event.start_utc)); }
      cell(tr, time(u.last_seen_utc), "last");
      cell(tr, u.outbox_backlog === null || u.outbox_backlog === undefined ? "–" : String(u.outbox_backlog), "backlog");
      return tr;
    });
    while (body.firstChild) { body.removeChild(body.firstChild); }
    rows.forEach(function (r) { body.appendChild(r); });
    var updated = document.getElementById("updated");
    updated.replaceChildren(time(data.generated_utc));
    table.setAttribute("data-refreshed", String(data.generated_utc));
  }
  function poll() {
    fetch(src, { headers: { "Accept": "application/json" }, credentials: "same-origin" })
      .then(function (r) { if (!r.ok) { throw new Error("HTTP " + r.status); } return r.json(); })
      .then(render)
      .catch(function (e) { marker.setAttribute("data-error", String(e)); })
      .then(function () { window.setTimeout(poll, every); });
  }
  window.setTimeout(poll, every);
})();
