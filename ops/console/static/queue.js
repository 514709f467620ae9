// The hold queue: keyboard moves, selection, decisions with a short undo, live count.
"use strict";
(function () {
  var S = window.Seawall;
  var list = document.getElementById("rows");
  if (!list) { return; }
  var undoSeconds = parseFloat(S.meta("seawall-undo") || "5");
  var toast = document.getElementById("toast");
  var toastText = document.getElementById("toast-text");
  var toastLeft = document.getElementById("toast-left");
  var toastUndo = document.getElementById("toast-undo");
  var bulkbar = document.getElementById("bulkbar");
  var picked = document.getElementById("picked");
  var heldCount = document.getElementById("held-count");
  var fresh = document.getElementById("fresh");
  var help = document.getElementById("help");
  var loadedNewest = parseFloat(heldCount.getAttribute("data-newest") || "0");
  var cursor = -1;
  var recent = [];   // decisions still inside their undo window, newest last
  var ticking = null;

  function rows() { return Array.prototype.filter.call(list.children, function (r) { return !r.classList.contains("leaving"); }); }
  function idsOf(row) { return row.getAttribute("data-ids").split(" ").filter(Boolean); }

  function moveTo(index) {
    var all = rows();
    if (!all.length) { cursor = -1; return; }
    index = Math.max(0, Math.min(all.length - 1, index));
    all.forEach(function (r) { r.classList.remove("cursor"); });
    var row = all[index];
    row.classList.add("cursor");
    row.focus({ preventScroll: true });
    row.scrollIntoView({ block: "nearest" });
    cursor = index;
  }
  function current() { var all = rows(); return cursor >= 0 && cursor < all.length ? all[cursor] : null; }

  function selected() { return rows().filter(function (r) { return r.querySelector(".pick").checked; }); }
  function refreshSelection() {
    var chosen = selected();
    rows().forEach(function (r) { r.classList.toggle("picked", r.querySelector(".pick").checked); });
    var count = chosen.reduce(function (n, r) { return n + idsOf(r).length; }, 0);
    bulkbar.hidden = chosen.length === 0;
    picked.textContent = chosen.length + " selected (" + S.number(count) + " comment" + (count === 1 ? "" : "s") + ")";
  }
  function clearSelection() {
    rows().forEach(function (r) { r.querySelector(".pick").checked = false; });
    refreshSelection();
  }

  function setCount(n) { heldCount.textContent = S.number(n); S.setHeld(n); }

  function showToast(message, final) {
    toast.hidden = false;
    toast.classList.toggle("final", !!final);
    toastText.textContent = message;
  }

  function tick() {
    var now = Date.now() / 1000;
    recent = recent.filter(function (d) {
      if (now < d.until) { return true; }
      d.rows.forEach(function (r) { r.remove(); });   // final now: the rows are gone for good
      return false;
    });
    if (!recent.length) {
      clearInterval(ticking); ticking = null;
      if (!toast.classList.contains("final")) { showToast("Decisions sent to the site.", true); }
      setTimeout(function () { if (!recent.length) { toast.hidden = true; } }, 2500);
      return;
    }
    toastLeft.textContent = "(" + Math.ceil(recent[recent.length - 1].until - now) + " s)";
  }

  function decide(targetRows, action) {
    if (!targetRows.length) { return; }
    var ids = [];
    targetRows.forEach(function (r) { ids = ids.concat(idsOf(r)); });
    var index = cursor;
    targetRows.forEach(function (r) { r.classList.add("leaving"); r.querySelector(".pick").checked = false; });
    refreshSelection();
    moveTo(Math.min(index, rows().length - 1));
    S.post("/api/decide", { ids: ids, action: action }).then(function (res) {
      var verb = action === "publish" ? "Published" : "Rejected";
      var n = res.decided.length;
      var message = verb + " " + S.number(n) + " comment" + (n === 1 ? "" : "s") + ".";
      if (res.gone.length) {
        message += " " + S.number(res.gone.length) + " had already been decided by someone else.";
      }
      setCount(Math.max(0, parseInt(heldCount.textContent.replace(/,/g, ""), 10) - n));
      if (!n) { showToast(message, true); setTimeout(function () { targetRows.forEach(function (r) { r.remove(); }); }, 0); return; }
      var until = Date.now() / 1000 + (res.undo_s || 0);
      recent.push({ token: res.token, ids: res.decided, rows: targetRows, until: until });
      showToast(message, !(res.undo_s > 0));
      if (res.undo_s > 0 && !ticking) { ticking = setInterval(tick, 250); }
      tick();
    }).catch(function (err) {
      targetRows.forEach(function (r) { r.classList.remove("leaving"); });
      showToast("Not decided: " + err.message, true);
    });
  }

  function undoLast() {
    var last = recent.pop();
    if (!last) { return; }
    S.post("/api/undo", { token: last.token, ids: last.ids }).then(function (res) {
      var back = res.restored.length;
      last.rows.forEach(function (r) { r.classList.remove("leaving"); });
      if (res.final.length && !back) {
        last.rows.forEach(function (r) { r.remove(); });
        showToast("Too late to undo: the decision was already sent.", true);
        return;
      }
      setCount(parseInt(heldCount.textContent.replace(/,/g, ""), 10) + back);
      showToast("Undone: " + S.number(back) + " comment" + (back === 1 ? " is" : "s are") + " back in the queue.", true);
      var all = rows();
      moveTo(all.indexOf(last.rows[0]));
      if (!recent.length && ticking) { clearInterval(ticking); ticking = null; }
    }).catch(function (err) {
      recent.push(last);
      showToast("Undo failed: " + err.message, false);
    });
  }

  function targets() {
    var chosen = selected();
    if (chosen.length) { return chosen; }
    var row = current();
    return row ? [row] : [];
  }

  list.addEventListener("click", function (ev) {
    var row = ev.target.closest(".row");
    if (!row) { return; }
    var all = rows();
    if (ev.target.classList.contains("pick")) { refreshSelection(); moveTo(all.indexOf(row)); return; }
    var button = ev.target.closest("button[data-act]");
    if (button) { moveTo(all.indexOf(row)); decide([row], button.getAttribute("data-act")); return; }
    if (!ev.target.closest("a, summary, details")) { moveTo(all.indexOf(row)); }
  });
  bulkbar.addEventListener("click", function (ev) {
    var button = ev.target.closest("button[data-bulk]");
    if (!button) { return; }
    var what = button.getAttribute("data-bulk");
    if (what === "none") { clearSelection(); } else { decide(selected(), what); }
  });
  toastUndo.addEventListener("click", undoLast);

  document.addEventListener("keydown", function (ev) {
    if (ev.ctrlKey || ev.metaKey || ev.altKey) { return; }
    var tag = (ev.target.tagName || "").toLowerCase();
    if (tag === "input" && ev.target.type !== "checkbox" || tag === "select" || tag === "textarea") {
      if (ev.key === "Escape") { ev.target.blur(); }
      return;
    }
    var row = current();
    switch (ev.key) {
      case "j": case "ArrowDown": moveTo(cursor + 1); break;
      case "k": case "ArrowUp": moveTo(cursor - 1); break;
      case "x": case " ":
        if (row) { var box = row.querySelector(".pick"); box.checked = !box.checked; refreshSelection(); }
        break;
      case "p": decide(targets(), "publish"); break;
      case "r": decide(targets(), "reject"); break;
      case "u": undoLast(); break;
      case "o": case "Enter":
        if (!row) { return; }
        var open = row.querySelector("a.open");
        var more = row.querySelector("details.full");
        if (more) { more.open = !more.open; } else if (open) { window.location.assign(open.href); }
        break;
      case "/": document.getElementById("filter-text").focus(); break;
      case "?": if (help.open) { help.close(); } else { help.showModal(); } break;
      case "Escape": clearSelection(); break;
      default: return;
    }
    ev.preventDefault();
  });

  function poll() {
    S.get("/api/queue/status").then(function (s) {
      setCount(s.held);
      if (s.newest && s.newest > loadedNewest + 0.001) {
        fresh.hidden = false;
        fresh.href = window.location.pathname + window.location.search;
      }
    }).catch(function () { /* a missed poll is retried on the next tick */ });
  }
  S.setHeld(parseInt(heldCount.textContent.replace(/,/g, ""), 10));
  setInterval(poll, S.pollSeconds() * 1000);
  if (rows().length) { moveTo(0); }
})();
