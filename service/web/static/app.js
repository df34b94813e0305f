// genvelope pages: sortable fleet table, live refresh of the page's
// fragments, and the alarm actions. No outside libraries.
(function () {
  "use strict";

  var body = document.body;
  var liveURL = body.getAttribute("data-live-url");
  var period = Number(body.getAttribute("data-refresh-ms")) || 2000;
  var statusEl = document.querySelector("[data-live-status]");
  var applied = {}; // fragment name -> HTML last put in place
  var deferred = {}; // fragments waiting for the operator to leave a control
  var timer = 0;
  var busy = false;
  var failures = 0;
  var lastClock = "";

  // ---- the sortable fleet table ----

  var table = document.querySelector("table[data-sortable]");
  var sortCol = -1; // -1: the server's order, worst first
  var sortDir = 1;

  function cellValue(tr, col, kind) {
    var td = tr.children[col];
    var v = td ? td.getAttribute("data-v") : "";
    if (v === null || v === "") return null;
    if (kind === "num") {
      var x = Number(v);
      return isNaN(x) ? null : x;
    }
    return v.toLowerCase();
  }

  function applySort() {
    if (!table) return;
    var tbody = table.tBodies[0];
    var rows = Array.prototype.slice.call(tbody.rows);
    var kind = "num";
    if (sortCol >= 0) {
      kind = table.tHead.rows[0].cells[sortCol].querySelector("button").getAttribute("data-sort");
    }
    rows.sort(function (a, b) {
      var ra = Number(a.getAttribute("data-rank")), rb = Number(b.getAttribute("data-rank"));
      if (sortCol < 0) return ra - rb;
      var va = cellValue(a, sortCol, kind), vb = cellValue(b, sortCol, kind);
      if (va === null && vb === null) return ra - rb;
      if (va === null) return 1; // values that do not exist go last either way
      if (vb === null) return -1;
      if (va < vb) return -sortDir;
      if (va > vb) return sortDir;
      return ra - rb;
    });
    rows.forEach(function (r) { tbody.appendChild(r); });
  }

  if (table) {
    var heads = table.tHead.rows[0].cells;
    Array.prototype.forEach.call(heads, function (th, col) {
      var btn = th.querySelector("button[data-sort]");
      if (!btn) return;
      th.setAttribute("aria-sort", "none");
      btn.addEventListener("click", function () {
        if (sortCol === col) {
          sortDir = -sortDir;
        } else {
          sortCol = col;
          sortDir = btn.getAttribute("data-first") === "desc" ? -1 : 1;
        }
        Array.prototype.forEach.call(heads, function (h) { h.setAttribute("aria-sort", "none"); });
        th.setAttribute("aria-sort", sortDir > 0 ? "ascending" : "descending");
        applySort();
      });
    });
    table.tBodies[0].addEventListener("click", function (ev) {
      if (ev.target.closest("a, button, input, select")) return;
      var tr = ev.target.closest("tr[data-href]");
      if (tr) window.location.assign(tr.getAttribute("data-href"));
    });
  }

  // ---- live refresh ----

  function setStatus(ok, clock) {
    if (!statusEl) return;
    if (ok) {
      lastClock = clock;
      statusEl.className = "live-status is-live";
      statusEl.innerHTML = '<span class="live-dot" aria-hidden="true"></span>';
      statusEl.appendChild(document.createTextNode("Live · updated " + clock));
      body.classList.remove("is-stale");
    } else {
      statusEl.className = "live-status is-lost";
      statusEl.innerHTML = '<span class="live-dot" aria-hidden="true"></span>';
      statusEl.appendChild(document.createTextNode("NOT UPDATING · last update " + (lastClock || "none") + " · retrying"));
      body.classList.add("is-stale");
    }
  }

  // holdsControl reports whether the operator is using a form control
  // inside el, which a swap would take away.
  function holdsControl(el) {
    var a = document.activeElement;
    return a && el.contains(a) && a.matches("select, input, textarea");
  }

  function swap(sections) {
    Object.keys(sections).forEach(function (name) {
      var html = sections[name];
      var el = document.querySelector('[data-part="' + name + '"]');
      if (!el || applied[name] === html) return;
      if (holdsControl(el)) {
        deferred[name] = html;
        return;
      }
      delete deferred[name];
      el.innerHTML = html;
      applied[name] = html;
      if (name === "fleet-rows") applySort();
    });
  }

  document.addEventListener("focusout", function () {
    // Put in place what waited for the operator, once they moved on.
    setTimeout(function () {
      var d = deferred;
      deferred = {};
      swap(d);
    }, 0);
  });

  function schedule(ms) {
    clearTimeout(timer);
    timer = setTimeout(refresh, ms);
  }

  function refresh() {
    if (!liveURL || busy) return;
    if (document.hidden) return; // resumed on visibilitychange
    busy = true;
    var ctl = new AbortController();
    var guard = setTimeout(function () { ctl.abort(); }, 3 * period);
    fetch(liveURL, { headers: { Accept: "application/json" }, cache: "no-store", signal: ctl.signal })
      .then(function (r) {
        if (!r.ok) throw new Error("HTTP " + r.status);
        return r.json();
      })
      .then(function (j) {
        failures = 0;
        swap(j.sections || {});
        setStatus(true, j.clock || "");
      })
      .catch(function () {
        failures++;
        setStatus(false);
      })
      .then(function () {
        clearTimeout(guard);
        busy = false;
        // Back off a little while the server cannot be reached.
        schedule(failures ? Math.min(period * (1 + failures), 15000) : period);
      });
  }

  document.addEventListener("visibilitychange", function () {
    if (!document.hidden) schedule(0);
  });

  // ---- alarm actions ----

  var operator = document.getElementById("operator");
  var result = document.querySelector("[data-action-result]");
  var storeKey = "genvelope.operator";
  if (operator) {
    try { operator.value = localStorage.getItem(storeKey) || ""; } catch (e) { /* storage off */ }
    operator.addEventListener("change", function () {
      try { localStorage.setItem(storeKey, operator.value.trim()); } catch (e) { /* storage off */ }
    });
  }

  document.addEventListener("submit", function (ev) {
    var form = ev.target.closest("form[data-action]");
    if (!form) return;
    ev.preventDefault();
    var data = new URLSearchParams(new FormData(form));
    data.set("operator", operator ? operator.value.trim() : "");
    var buttons = form.querySelectorAll("button");
    buttons.forEach(function (b) { b.disabled = true; });
    fetch(form.action, { method: "POST", body: data, headers: { Accept: "application/json" } })
      .then(function (r) {
        return r.json().catch(function () { return { ok: false, message: "The server answered " + r.status + "." }; });
      })
      .then(function (j) {
        if (result) {
          result.textContent = j.message || (j.ok ? "Done." : "Not done.");
          result.className = "action-result" + (j.ok ? "" : " is-error");
        }
      })
      .catch(function () {
        if (result) {
          result.textContent = "The server could not be reached; nothing was changed.";
          result.className = "action-result is-error";
        }
      })
      .then(function () {
        buttons.forEach(function (b) { b.disabled = false; });
        schedule(0);
      });
  });

  if (liveURL) schedule(period);
})();
