// likewise operator console. The token lives in this tab's sessionStorage and goes out
// only as an Authorization header on fetches to this origin; the page's parts are HTML
// rendered by the service (already escaped there), so they are inserted as they come.
"use strict";
(() => {
  const TOKEN = "likewise.console.token";
  const PICKED = "likewise.console.metric";
  const REFRESH_MS = 10000;
  const $ = (id) => document.getElementById(id);
  let refresh = null;

  const token = () => sessionStorage.getItem(TOKEN);

  function say(text, bad = false) {
    const box = $("notice");
    box.textContent = text;
    box.classList.toggle("bad", bad);
    box.hidden = !text;
  }

  function randomKey() {
    const bytes = new Uint8Array(16);
    crypto.getRandomValues(bytes);
    return "console-" + Array.from(bytes, (b) => b.toString(16).padStart(2, "0")).join("");
  }

  async function call(path, options = {}) {
    const headers = { ...(options.headers || {}), Authorization: "Bearer " + token() };
    const resp = await fetch(path, { ...options, headers, cache: "no-store", credentials: "omit" });
    if (resp.status === 401) {
      signOut();
      say("The service refused that token. Sign in again.", true);
      throw new Error("refused");
    }
    return resp;
  }

  async function detail(resp) {
    try {
      const body = await resp.json();
      return body.detail || body.title || String(resp.status);
    } catch {
      return `${resp.status} ${resp.statusText}`;
    }
  }

  function markPicked() {
    const picked = sessionStorage.getItem(PICKED);
    for (const chip of document.querySelectorAll(".chip")) {
      chip.setAttribute("aria-pressed", String(chip.dataset.metric === picked));
    }
  }

  // only the newest request of each part is applied: an older answer arriving late
  // is dropped; #metric carries data-loading while its newest request runs
  const latest = { overview: 0, metric: 0 };

  async function fetchPart(part, path) {
    const seq = ++latest[part];
    const resp = await call(path);
    const body = resp.ok ? await resp.text() : await detail(resp);
    if (seq !== latest[part]) return null;
    if (!resp.ok) {
      say(body, true);
      return null;
    }
    return body;
  }

  async function loadOverview() {
    const html = await fetchPart("overview", "parts/overview");
    if (html === null) return;
    $("overview").innerHTML = html;
    const chips = [...document.querySelectorAll(".chip")];
    const picked = sessionStorage.getItem(PICKED);
    if (chips.length && !chips.some((c) => c.dataset.metric === picked)) {
      await loadMetric(chips[0].dataset.metric);
    }
    markPicked();
  }

  async function loadMetric(name) {
    sessionStorage.setItem(PICKED, name);
    markPicked();
    const box = $("metric");
    box.dataset.loading = "true";
    const seq = latest.metric + 1;
    try {
      const html = await fetchPart("metric", "parts/metrics/" + encodeURIComponent(name));
      if (html !== null) box.innerHTML = html;
    } finally {
      if (seq === latest.metric) delete box.dataset.loading;
    }
  }

  async function show() {
    $("sign-in").hidden = true;
    $("desk").hidden = false;
    $("who").hidden = false;
    $("stamp").textContent = "signed in (token kept in this tab only)";
    await loadOverview();
    const picked = sessionStorage.getItem(PICKED);
    if (picked && !$("metric").querySelector("#metric-board")) await loadMetric(picked);
    clearInterval(refresh);
    refresh = setInterval(() => loadOverview().catch(() => {}), REFRESH_MS);
  }

  function signOut() {
    clearInterval(refresh);
    sessionStorage.removeItem(TOKEN);
    sessionStorage.removeItem(PICKED);
    $("overview").innerHTML = "";
    $("metric").innerHTML = "";
    $("desk").hidden = true;
    $("who").hidden = true;
    $("sign-in").hidden = false;
    $("token").value = "";
  }

  function openRollback(button) {
    const dialog = $("rollback");
    const fill = { name: button.dataset.metric, from: button.dataset.from, to: button.dataset.to };
    for (const el of dialog.querySelectorAll("[data-fill]")) el.textContent = fill[el.dataset.fill];
    dialog.dataset.metric = fill.name;
    dialog.dataset.to = fill.to;
    dialog.dataset.from = fill.from;
    $("reason").value = "";
    dialog.showModal();
    $("reason").focus();
  }

  async function rollBack(event) {
    event.preventDefault();
    const dialog = $("rollback");
    const { metric, to, from } = dialog.dataset;
    const resp = await call("../v1/metrics/" + encodeURIComponent(metric) + "/active", {
      method: "PUT",
      headers: { "Content-Type": "application/json", "Idempotency-Key": randomKey() },
      body: JSON.stringify({ version: Number(to), reason: $("reason").value }),
    });
    dialog.close();
    if (!resp.ok) {
      say(`Roll-back refused: ${await detail(resp)}`, true);
      return;
    }
    say(`${metric}: version ${to} serves again (version ${from} stepped down).`);
    await loadMetric(metric);
    await loadOverview();
  }

  document.addEventListener("DOMContentLoaded", () => {
    $("sign-in-form").addEventListener("submit", (event) => {
      event.preventDefault();
      const typed = $("token").value.trim();
      if (!typed) return;
      sessionStorage.setItem(TOKEN, typed);
      $("token").value = "";
      say("");
      show().catch(() => {});
    });
    $("sign-out").addEventListener("click", () => { signOut(); say("Token forgotten."); });
    $("overview").addEventListener("click", (event) => {
      const chip = event.target.closest(".chip");
      if (chip) loadMetric(chip.dataset.metric).catch(() => {});
    });
    $("metric").addEventListener("click", (event) => {
      const button = event.target.closest("#rollback-open");
      if (button) openRollback(button);
    });
    $("rollback-form").addEventListener("submit", (event) => rollBack(event).catch(() => {}));
    $("rollback-cancel").addEventListener("click", () => $("rollback").close());
    if (token()) show().catch(() => {});
  });
})();
