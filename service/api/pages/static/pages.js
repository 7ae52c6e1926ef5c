// cairn's pages: the demo shop and the operator view. No framework, no build step.
// Everything shown from the service is written with textContent (never innerHTML), so an item id
// or name is always text; the page's Content-Security-Policy allows this file and nothing inline.
"use strict";

(function () {
  const page = document.body.dataset.page;

  function el(tag, text, className) {
    const node = document.createElement(tag);
    if (text !== undefined && text !== null) node.textContent = String(text);
    if (className) node.className = className;
    return node;
  }

  function clear(node) {
    while (node.firstChild) node.removeChild(node.firstChild);
  }

  function setText(id, text) {
    const node = document.getElementById(id);
    if (node) node.textContent = text === undefined || text === null ? "–" : String(text);
  }

  // Server-Timing (W3C Server Timing): "name;dur=1.23, other;dur=4.5" -> "name 1.23 ms · other 4.5 ms".
  function serverTiming(header) {
    if (!header) return "–";
    return header.split(",").map(function (entry) {
      const parts = entry.trim().split(";");
      const dur = parts.slice(1).map(function (p) { return p.trim(); }).find(function (p) { return p.indexOf("dur=") === 0; });
      return parts[0] + (dur ? " " + dur.slice(4) + " ms" : "");
    }).join(" · ");
  }

  // -- the shop -------------------------------------------------------------------------------------

  function shop() {
    const KEY = "cairn-shop-visit";
    const COUNT = 8;
    const names = new Map();
    document.querySelectorAll("#grid .item").forEach(function (button) {
      if (button.dataset.name) names.set(button.dataset.itemId, button.dataset.name);
      button.addEventListener("click", function () { click(button.dataset.itemId); });
    });

    function fresh() {
      const bytes = new Uint8Array(8);
      crypto.getRandomValues(bytes);
      const hex = Array.from(bytes, function (b) { return b.toString(16).padStart(2, "0"); }).join("");
      return { id: "shop-" + hex, clicks: [], budget: null };
    }

    function restore() {
      try {
        const saved = JSON.parse(sessionStorage.getItem(KEY));
        if (saved && typeof saved.id === "string" && Array.isArray(saved.clicks)) return saved;
      } catch (e) { /* a broken entry starts a new visit */ }
      return fresh();
    }

    let visit = restore();
    const save = function () { sessionStorage.setItem(KEY, JSON.stringify(visit)); };

    function label(itemId) {
      return names.has(itemId) ? names.get(itemId) : itemId;
    }

    // Names of items not on this grid page, from the artifact (the ids alone when it has none).
    async function learnNames(ids) {
      const unknown = ids.filter(function (i) { return !names.has(i); });
      if (!unknown.length) return;
      const query = unknown.map(function (i) { return "id=" + encodeURIComponent(i); }).join("&");
      try {
        const r = await fetch("/shop/names?" + query);
        if (r.ok) {
          const body = await r.json();
          Object.keys(body.names).forEach(function (i) { names.set(i, body.names[i]); });
        }
      } catch (e) { /* names are a nicety: ids still show */ }
    }

    function showVisit() {
      setText("visit-id", visit.id);
      setText("budget-now", visit.budget ? visit.budget + " ms" : "service default (" + document.body.dataset.defaultBudgetMs + " ms)");
      const list = document.getElementById("clicks");
      clear(list);
      visit.clicks.forEach(function (itemId) {
        const li = el("li");
        li.appendChild(el("span", label(itemId), "name"));
        li.appendChild(el("span", itemId, "id"));
        list.appendChild(li);
      });
    }

    function clearAnswer() {
      ["served-by", "fallback-reason", "answer-artifact", "elapsed", "sequence", "server-timing"].forEach(function (id) { setText(id, "–"); });
      clear(document.getElementById("recommendations"));
      setText("error", "");
    }

    async function showAnswer(answer, timing) {
      await learnNames(answer.items.map(function (it) { return it.item_id; }));
      setText("error", "");
      setText("served-by", answer.served_by);
      setText("fallback-reason", answer.fallback_reason === null ? "none" : answer.fallback_reason);
      document.getElementById("fallback-reason").classList.toggle("warn", answer.fallback_reason !== null);
      setText("answer-artifact", answer.artifact);
      setText("elapsed", answer.elapsed_ms + " ms");
      setText("sequence", answer.sequence);
      setText("server-timing", serverTiming(timing));
      const list = document.getElementById("recommendations");
      clear(list);
      answer.items.forEach(function (it) {
        const button = el("button", null, "item rec");
        button.type = "button";
        button.dataset.itemId = it.item_id;
        button.appendChild(el("span", label(it.item_id), "name"));
        button.appendChild(el("span", it.item_id, "id"));
        button.appendChild(el("span", Number(it.score).toFixed(3), "score"));
        button.addEventListener("click", function () { click(it.item_id); });
        const li = el("li");
        li.appendChild(button);
        list.appendChild(li);
      });
    }

    async function call(method, url, body) {
      const options = { method: method, headers: {} };
      if (body !== undefined) {
        options.headers["content-type"] = "application/json";
        options.body = JSON.stringify(body);
      }
      const r = await fetch(url, options);
      const data = await r.json();
      if (!r.ok) throw new Error((data && data.message) || ("HTTP " + r.status));
      return { data: data, timing: r.headers.get("server-timing") };
    }

    const sessionUrl = function () { return "/v1/sessions/" + encodeURIComponent(visit.id); };

    async function click(itemId) {
      const body = { item_id: itemId, count: COUNT };
      if (visit.budget) body.budget_ms = visit.budget;
      try {
        const got = await call("POST", sessionUrl() + "/clicks", body);
        visit.clicks.push(itemId);
        save();
        showVisit();
        await showAnswer(got.data, got.timing);
      } catch (e) {
        setText("error", e.message);
      }
    }

    async function current() {
      if (!visit.clicks.length) return;
      let url = sessionUrl() + "/recommendations?count=" + COUNT;
      if (visit.budget) url += "&budget_ms=" + visit.budget;
      try {
        const got = await call("GET", url);
        await showAnswer(got.data, got.timing);
      } catch (e) {
        setText("error", e.message);
      }
    }

    document.getElementById("new-visit").addEventListener("click", function () {
      fetch(sessionUrl(), { method: "DELETE" }).catch(function () { /* the visit expires anyway */ });
      const budget = visit.budget;
      visit = fresh();
      visit.budget = budget;
      save();
      showVisit();
      clearAnswer();
    });

    document.getElementById("set-budget").addEventListener("click", function () {
      const input = document.getElementById("budget");
      const value = input.value.trim();
      if (value === "") {
        visit.budget = null;
      } else {
        const n = Number(value);
        if (!Number.isInteger(n) || n < 1 || n > 10000) {
          setText("error", "budget: a whole number of milliseconds from 1 to 10000");
          return;
        }
        visit.budget = n;
      }
      save();
      showVisit();
      current();
    });

    save();
    showVisit();
    learnNames(visit.clicks).then(showVisit);
    current();
  }

  // -- the operator view ----------------------------------------------------------------------------

  function operator() {
    const STATES = { closed: "ok", "half-open": "warn", open: "bad" };
    const budget = Number(document.body.dataset.budgetMs);

    function rows(tbodyId, entries, classOf) {
      const tbody = document.getElementById(tbodyId);
      clear(tbody);
      if (!entries.length) {
        const tr = el("tr");
        const td = el("td", "none yet", "muted");
        td.colSpan = 2;
        tr.appendChild(td);
        tbody.appendChild(tr);
        return;
      }
      entries.forEach(function (entry) {
        const tr = el("tr");
        tr.dataset.key = entry[0];
        tr.appendChild(el("td", entry[0]));
        tr.appendChild(el("td", entry[1], classOf ? classOf(entry[1]) : null));
        tbody.appendChild(tr);
      });
    }

    const ms = function (v) { return v === null || v === undefined ? "no answers" : v + " ms"; };

    async function refresh() {
      try {
        const [readyRes, summaryRes] = await Promise.all([fetch("/readyz"), fetch("/operator/summary.json")]);
        const ready = await readyRes.json(); // 503 when degraded, with the same JSON
        const summary = await summaryRes.json();
        if (ready.active) {
          setText("live-artifact", ready.active.artifact);
          setText("live-recommender", ready.active.recommender);
        }
        setText("ready", ready.ready ? "ready" : "degraded: " + ready.degraded.join(", "));
        document.getElementById("ready").className = ready.ready ? "ok" : "bad";
        setText("store-health", ready.store ? "answering" : "not answering (visits served without their history)");
        document.getElementById("store-health").className = ready.store ? "ok" : "bad";
        rows("breakers", Object.entries(ready.breakers), function (state) { return STATES[state] || ""; });
        setText("window", Math.round(summary.window_s));
        setText("rate", summary.answers_per_s + " answers/s (" + summary.answers_in_window + ")");
        setText("p50", ms(summary.p50_ms));
        setText("p99", ms(summary.p99_ms) + (summary.p99_ms === null ? "" : " of " + budget + " ms budget"));
        const over = summary.p99_ms !== null && summary.p99_ms > budget;
        document.getElementById("p99").className = over ? "bad" : "";
        document.getElementById("p99-meter").value = Math.min(summary.p99_ms || 0, budget);
        rows("served-by-table", Object.entries(summary.answers_by_served_by));
        rows("fallbacks-table", Object.entries(summary.fallbacks_by_reason));
        setText("updated", new Date().toLocaleTimeString());
      } catch (e) {
        setText("updated", "refresh failed: " + e.message);
      }
    }

    refresh();
    setInterval(refresh, 2000);
  }

  if (page === "shop") shop();
  else if (page === "operator") operator();
})();
