// Seawall console: helpers shared by the pages.  No data is ever written with
// innerHTML: text goes in with textContent, so a comment cannot become markup.
"use strict";
(function () {
  function meta(name) {
    var el = document.querySelector('meta[name="' + name + '"]');
    return el ? el.getAttribute("content") : null;
  }

  function request(method, url, body) {
    var opts = { method: method, credentials: "same-origin", headers: { "Accept": "application/json" } };
    if (body !== undefined) {
      opts.headers["Content-Type"] = "application/json";
      opts.headers["X-Seawall-CSRF"] = meta("seawall-csrf") || "";
      opts.body = JSON.stringify(body);
    }
    return fetch(url, opts).then(function (res) {
      if (res.status === 401) {
        window.location.assign("/signin?next=" + encodeURIComponent(window.location.pathname + window.location.search));
        throw new Error("signed out");
      }
      return res.json().catch(function () { return {}; }).then(function (data) {
        if (!res.ok) { throw new Error(data.error || ("the console answered " + res.status)); }
        return data;
      });
    });
  }

  function el(tag, cls, text) {
    var node = document.createElement(tag);
    if (cls) { node.className = cls; }
    if (text !== undefined && text !== null) { node.textContent = String(text); }
    return node;
  }

  function number(n) { return n === null || n === undefined ? "–" : Number(n).toLocaleString("en"); }

  // the same format as `seawall watch` and the queue's server-side ages
  function ago(seconds) {
    seconds = Math.max(0, Math.floor(seconds));
    if (seconds < 120) { return seconds + "s"; }
    if (seconds < 7200) { return Math.floor(seconds / 60) + "m"; }
    if (seconds < 172800) { return Math.floor(seconds / 3600) + "h " + Math.floor((seconds % 3600) / 60) + "m"; }
    return Math.floor(seconds / 86400) + "d " + Math.floor((seconds % 86400) / 3600) + "h";
  }

  function clock(ts) {
    var d = new Date(ts * 1000);
    return ("0" + d.getUTCHours()).slice(-2) + ":" + ("0" + d.getUTCMinutes()).slice(-2);
  }

  function setHeld(n) {
    var badge = document.getElementById("nav-held");
    if (badge) { badge.textContent = n ? number(n) : ""; }
  }

  window.Seawall = {
    meta: meta,
    get: function (url) { return request("GET", url); },
    post: function (url, body) { return request("POST", url, body || {}); },
    el: el, number: number, ago: ago, clock: clock, setHeld: setHeld,
    pollSeconds: function () { return Math.max(0.2, parseFloat(meta("seawall-poll") || "5")); }
  };
})();
