// The live overview: polls /api/overview and redraws each panel in place (no page reload).
"use strict";
(function () {
  var S = window.Seawall;
  var root = document.getElementById("overview");
  if (!root) { return; }
  var SVG = "http://www.w3.org/2000/svg";
  var W = 900, H = 260, L = 44, R = 12, T = 12, B = 28;

  function $(id) { return document.getElementById(id); }
  function svg(tag, attrs, cls) {
    var node = document.createElementNS(SVG, tag);
    Object.keys(attrs || {}).forEach(function (k) { node.setAttribute(k, attrs[k]); });
    if (cls) { node.setAttribute("class", cls); }
    return node;
  }
  function clear(node) { while (node.firstChild) { node.removeChild(node.firstChild); } return node; }
  function pct(x) { return x === null || x === undefined ? "–" : (x * 100).toFixed(x < 0.1 ? 1 : 0) + " %"; }
  function none(list, text) { list.appendChild(S.el("li", "none", text)); }

  function niceTop(max) {
    var steps = [0.05, 0.1, 0.2, 0.25, 0.5, 1];
    for (var i = 0; i < steps.length; i++) { if (max <= steps[i]) { return steps[i]; } }
    return 1;
  }

  function drawChart(rates, waves, now) {
    var box = clear($("chart"));
    var legend = clear($("legend"));
    var starts = rates.starts, series = rates.series;
    var plot = svg("svg", { viewBox: "0 0 " + W + " " + H, preserveAspectRatio: "xMidYMid meet" });
    box.appendChild(plot);
    if (!series.length) {
      var t = svg("text", { x: W / 2, y: H / 2, "text-anchor": "middle" }, "empty-note");
      t.textContent = "No comments counted in the last 3 hours.";
      plot.appendChild(t);
      return;
    }
    var top = 0;
    series.forEach(function (s) { s.rates.forEach(function (r) { if (r !== null && r > top) { top = r; } }); });
    top = niceTop(Math.max(top, 0.01));
    var t0 = starts[0], t1 = Math.max(starts[starts.length - 1], t0 + 1);
    function x(ts) { return L + (W - L - R) * (ts - t0) / (t1 - t0); }
    function y(r) { return T + (H - T - B) * (1 - r / top); }
    for (var g = 0; g <= 4; g++) {
      var v = top * g / 4;
      plot.appendChild(svg("line", { x1: L, x2: W - R, y1: y(v), y2: y(v) }, g ? "gridline" : "axis"));
      var lab = svg("text", { x: L - 6, y: y(v) + 4, "text-anchor": "end" });
      lab.textContent = Math.round(v * 100) + "%";
      plot.appendChild(lab);
    }
    starts.forEach(function (ts) {
      if (ts % 1800 === 0) {
        var tl = svg("text", { x: x(ts), y: H - 8, "text-anchor": "middle" });
        tl.textContent = S.clock(ts);
        plot.appendChild(tl);
      }
    });
    var waveSites = {};
    waves.forEach(function (w) { waveSites[w.site] = true; });
    series.forEach(function (s, i) {
      var cls = "c" + (i % 8);
      var d = "", pen = false, last = null;
      s.rates.forEach(function (r, j) {
        if (r === null) { pen = false; return; }
        d += (pen ? " L " : " M ") + x(starts[j]).toFixed(1) + " " + y(r).toFixed(1);
        pen = true;
        last = j;
      });
      if (d) { plot.appendChild(svg("path", { d: d }, "line " + cls)); }
      if (last !== null) {
        plot.appendChild(svg("circle", { cx: x(starts[last]), cy: y(s.rates[last]), r: 3.5 }, "dot " + cls));
      }
      var item = S.el("li");
      item.appendChild(S.el("span", "swatch " + cls));
      item.appendChild(S.el("bdi", null, s.site || "(no site)"));
      item.appendChild(document.createTextNode(" " + pct(last === null ? null : s.rates[last]) + " now, "
        + S.number(s.total) + " comments"));
      if (waveSites[s.site]) { item.appendChild(S.el("span", "wave", "wave")); }
      legend.appendChild(item);
    });
  }

  function fillList(id, items, empty, render) {
    var list = clear($(id));
    if (!items.length) { none(list, empty); return; }
    items.forEach(function (it) { list.appendChild(render(it)); });
  }

  function example(text) { return S.el("span", "ex", text ? "“" + text + "”" : "(example text expired)"); }

  function tableRows(id, rows, cells) {
    var body = clear($(id).querySelector("tbody"));
    rows.forEach(function (row) {
      var tr = S.el("tr");
      cells(row).forEach(function (c) {
        var td = S.el("td", c.cls || null, c.text);
        tr.appendChild(td);
      });
      body.appendChild(tr);
    });
    if (!rows.length) {
      var tr = S.el("tr"), td = S.el("td", "note", "none");
      td.colSpan = $(id).querySelectorAll("th").length;
      tr.appendChild(td); body.appendChild(tr);
    }
  }

  function gateCell(gate) {
    var td = S.el("td", "gate");
    if (!gate) { td.appendChild(S.el("span", "note", "no retrain report")); return td; }
    td.appendChild(S.el("span", "pill " + gate.decision, gate.decision));
    if (gate.chosen) { td.appendChild(document.createTextNode(" (" + gate.chosen.replace("_", " ") + ")")); }
    if (gate.labels_new !== null && gate.labels_new !== undefined) {
      td.appendChild(document.createTextNode(" on " + S.number(gate.labels_new) + " new labels"));
    }
    gate.sets.forEach(function (s) {
      var a = s.active || {}, c = s.candidate || {};
      var line = s.set + ": ROC-AUC " + (a.roc_auc !== undefined ? a.roc_auc.toFixed(4) : "?") + " → "
        + (c.roc_auc !== undefined ? c.roc_auc.toFixed(4) : "?");
      if (c.recall_at_gate_fpr !== undefined) {
        line += ", recall " + (a.recall_at_gate_fpr !== undefined ? a.recall_at_gate_fpr.toFixed(3) : "?") + " → "
          + c.recall_at_gate_fpr.toFixed(3);
      }
      td.appendChild(S.el("div", null, line));
    });
    if (gate.decision !== "promoted" && gate.reasons.length) {
      td.appendChild(S.el("div", "reasons", gate.reasons.slice(0, 3).join("; ")));
    }
    return td;
  }

  function switchModel(kind, version) {
    var question = kind === "promote" ? "Make " + version + " the active model on every worker?"
      : "Roll back to the previously promoted model?";
    if (!window.confirm(question)) { return; }
    var msg = $("model-message");
    msg.textContent = kind === "promote" ? "Promoting…" : "Rolling back…";
    S.post("/api/models/" + kind, kind === "promote" ? { version: version } : {}).then(function (res) {
      var text = res.version + " is active (was " + (res.previous || "none") + ").";
      if (res.rescore) { text += " Re-scored " + S.number(res.rescore.rescored) + " held comments, "
        + S.number(res.rescore.released) + " left the queue."; }
      msg.textContent = text;
      refresh();
    }).catch(function (err) { msg.textContent = "Not done: " + err.message; });
  }

  function drawModels(models, admin, now) {
    var body = clear($("models").querySelector("tbody"));
    var box = clear($("rollback-box"));
    $("models-note").textContent = models.active ? "(active: " + models.active + ")" : "(no active model)";
    var last = models.last_retrain, line = $("last-retrain");
    line.textContent = "";
    if (last) {
      line.appendChild(document.createTextNode("Last retrain: "));
      line.appendChild(S.el("span", "pill " + last.decision, last.decision));
      line.appendChild(document.createTextNode((last.finished_at ? " " + S.ago(now - last.finished_at) + " ago" : "")
        + (last.decision !== "promoted" && last.reasons.length ? ": " + last.reasons[last.reasons.length - 1] : "")));
    }
    if (admin && models.can_roll_back) {
      var rb = S.el("button", "quiet", "Roll back to " + models.previous);
      rb.type = "button";
      rb.addEventListener("click", function () { switchModel("rollback"); });
      box.appendChild(rb);
    }
    models.versions.forEach(function (m) {
      var tr = S.el("tr", m.active ? "active" : null);
      var v = S.el("td", "mono", m.version);
      if (m.active) { v.appendChild(document.createTextNode(" ")); v.appendChild(S.el("span", "pill active", "active")); }
      tr.appendChild(v);
      tr.appendChild(S.el("td", null, m.source + (m.parent ? " from " + m.parent : "")));
      tr.appendChild(S.el("td", null, m.pushed_at ? S.ago(now - m.pushed_at) + " ago" : "–"));
      tr.appendChild(S.el("td", null, m.hold !== null ? "hold " + m.hold.toFixed(3) + ", reject " + m.reject.toFixed(3) : "–"));
      tr.appendChild(gateCell(m.gate));
      var act = S.el("td");
      if (admin && !m.active) {
        var b = S.el("button", null, "Promote");
        b.type = "button";
        b.addEventListener("click", function () { switchModel("promote", m.version); });
        act.appendChild(b);
      }
      tr.appendChild(act);
      body.appendChild(tr);
    });
  }

  function draw(d) {
    var now = d.now;
    $("stamp").textContent = new Date(now * 1000).toISOString().replace("T", " ").slice(0, 19) + " UTC";
    $("stale").hidden = true;
    $("t-held").textContent = S.number(d.held) + (d.deciding ? " (+" + S.number(d.deciding) + " being decided)" : "");
    S.setHeld(d.held);
    var decided = 0;
    Object.keys(d.decisions_last_hour).forEach(function (k) { decided += d.decisions_last_hour[k]; });
    $("t-decided").textContent = S.number(decided);
    var workers = d.groups.filter(function (g) { return g.stream.slice(-9) === ":comments"; });
    $("t-lag").textContent = workers.length ? S.number(workers[0].lag) : "no group";
    $("t-dead").textContent = S.number(d.deadletters.sampled);
    var active = d.models.versions.filter(function (m) { return m.active; })[0];
    $("t-model").textContent = d.models.active || "none";
    if (active && active.promoted_at) { $("t-model").title = "promoted " + S.ago(now - active.promoted_at) + " ago"; }

    drawChart(d.rates, d.waves, now);
    fillList("waves", d.waves, "No wave: every site's flagged share is normal.", function (w) {
      var li = S.el("li", "hot");
      li.appendChild(S.el("bdi", null, w.site));
      li.appendChild(document.createTextNode(": flagged " + pct(w.rate) + " against a normal " + pct(w.baseline)
        + (w.since ? ", since " + S.clock(w.since) + " UTC" : "")));
      return li;
    });
    fillList("campaigns", d.campaigns, "No active campaign.", function (c) {
      var li = S.el("li", "hot");
      li.appendChild(S.el("strong", "mono", c.id));
      li.appendChild(document.createTextNode(" on "));
      li.appendChild(S.el("bdi", null, c.site || "?"));
      li.appendChild(document.createTextNode(": " + S.number(c.members) + " members"
        + (c.started ? ", started " + S.ago(now - c.started) + " ago" : "")));
      li.appendChild(example(c.example));
      return li;
    });
    fillList("families", d.families, "No near-duplicate family is held.", function (f) {
      var li = S.el("li");
      var link = S.el("a", null, S.number(f.size) + " comments");
      link.href = "/queue?view=list&group=" + encodeURIComponent(f.key);
      li.appendChild(link);
      li.appendChild(document.createTextNode(" from " + f.authors + " authors on " + f.sites.join(", ")
        + ", newest " + S.ago(now - f.newest) + " ago"));
      li.appendChild(example(f.example));
      return li;
    });
    tableRows("dead", d.deadletters.reasons, function (r) {
      return [{ text: r.reason, cls: "mono" }, { text: S.number(r.count), cls: "num" }];
    });
    $("dead-note").textContent = d.deadletters.sampled
      ? "From the newest " + S.number(d.deadletters.sampled) + " dead letters" + (d.deadletters.since
        ? ", back to " + new Date(d.deadletters.since * 1000).toISOString().slice(0, 16).replace("T", " ") + " UTC" : "") + "."
      : "";
    tableRows("groups", d.groups, function (g) {
      return [{ text: g.stream }, { text: g.group }, { text: S.number(g.lag), cls: "num" },
        { text: S.number(g.pending), cls: "num" }, { text: S.number(g.consumers), cls: "num" }];
    });
    fillList("events", d.events, "No events yet.", function (e) {
      return S.el("li", null, S.clock(e.ts) + "  " + e.type + "  " + e.summary);
    });
    drawModels(d.models, d.admin, now);
  }

  function refresh() {
    return S.get("/api/overview").then(draw).catch(function () { $("stale").hidden = false; });
  }
  refresh();
  setInterval(refresh, S.pollSeconds() * 1000);
})();
