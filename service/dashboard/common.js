// Shared helpers of the fixq dashboard pages: API calls, the sign-in panel,
// DOM building and number/time formatting. Plain browser JavaScript, no build step.
"use strict";

const fixq = (() => {
  class ApiError extends Error {
    constructor(status, body) {
      super((body && (body.detail || body.title)) || `HTTP ${status}`);
      this.status = status;
      this.body = body;
    }
  }

  // The session cookie rides along on same-origin requests; the key itself
  // is never visible to this script (the cookie is HttpOnly).
  async function api(path, options = {}) {
    const response = await fetch(path, {
      credentials: "same-origin",
      headers: { Accept: "application/json", ...(options.headers || {}) },
      ...options,
    });
    const type = response.headers.get("Content-Type") || "";
    const body = type.includes("json") ? await response.json() : await response.text();
    if (!response.ok) throw new ApiError(response.status, body);
    return body;
  }

  function el(tag, attributes = {}, ...children) {
    const node = document.createElement(tag);
    for (const [name, value] of Object.entries(attributes)) {
      if (value === null || value === undefined || value === false) continue;
      if (name === "text") node.textContent = value;
      else if (name === "class") node.className = value;
      else if (name.startsWith("on")) node.addEventListener(name.slice(2), value);
      else node.setAttribute(name, value === true ? "" : value);
    }
    for (const child of children.flat()) {
      if (child === null || child === undefined || child === false) continue;
      node.append(child instanceof Node ? child : document.createTextNode(String(child)));
    }
    return node;
  }

  // Job times may arrive as ISO strings or as epoch seconds/milliseconds.
  function toDate(value) {
    if (value === null || value === undefined || value === "") return null;
    if (typeof value === "number") return new Date(value > 1e12 ? value : value * 1000);
    const parsed = Date.parse(value);
    if (!Number.isNaN(parsed)) return new Date(parsed);
    const number = Number(value);
    return Number.isFinite(number) ? toDate(number) : null;
  }

  function formatTime(value) {
    const date = toDate(value);
    if (!date) return "—";
    const now = new Date();
    const sameDay = date.toDateString() === now.toDateString();
    const time = date.toLocaleTimeString([], { hour: "2-digit", minute: "2-digit", second: "2-digit" });
    return sameDay ? time : `${date.toLocaleDateString()} ${time}`;
  }

  function timeCell(value) {
    const date = toDate(value);
    return el("time", { datetime: date ? date.toISOString() : null, title: date ? date.toString() : null, text: formatTime(value) });
  }

  function formatBound(value) {
    if (value === null || value === undefined || !Number.isFinite(Number(value))) return "—";
    const number = Number(value);
    if (number === 0) return "0";
    return Math.abs(number) < 1e-3 || Math.abs(number) >= 1e5 ? number.toExponential(2) : number.toPrecision(3);
  }

  function formatCount(value) {
    if (value === null || value === undefined || value === "") return "—";
    const number = Number(value);
    return Number.isFinite(number) ? number.toLocaleString() : String(value);
  }

  function formatSeconds(value) {
    const number = Number(value);
    if (!Number.isFinite(number)) return "—";
    if (number < 1) return `${(number * 1000).toFixed(0)} ms`;
    if (number < 120) return `${number.toFixed(number < 10 ? 2 : 1)} s`;
    return `${(number / 60).toFixed(1)} min`;
  }

  function stateBadge(state) {
    return el("span", { class: `state state-${state || "unknown"}`, text: state || "unknown" });
  }

  function isActive(state) {
    return state === "queued" || state === "running";
  }

  // Which of sign-in form, content, and sign-out button to show.
  async function requireSession() {
    const session = await api("/ui/session");
    const signout = document.getElementById("signout");
    const who = document.getElementById("who");
    if (session.auth && session.signed_in) {
      signout.classList.remove("hidden");
      if (who) who.textContent = session.owner ? `signed in as ${session.owner}` : "";
    }
    if (session.auth && !session.signed_in) {
      showSignin();
      return null;
    }
    return session;
  }

  function showSignin() {
    document.getElementById("content").classList.add("hidden");
    const panel = document.getElementById("signin");
    panel.classList.remove("hidden");
    panel.querySelector("input[name=next]").value = window.location.pathname;
    const failed = new URLSearchParams(window.location.search).get("signin") === "failed";
    panel.querySelector(".problem").classList.toggle("hidden", !failed);
    panel.querySelector("input[name=key]").focus();
  }

  // Once the page has loaded: the sign-in check, then the page's own start (not when signed out).
  function startPage(start) {
    document.addEventListener("DOMContentLoaded", async () => {
      try {
        if (!(await requireSession())) return;
      } catch (error) {
        showError("problem", error);
        return;
      }
      await start();
    });
  }

  function showError(where, error) {
    const box = typeof where === "string" ? document.getElementById(where) : where;
    box.classList.remove("hidden");
    box.replaceChildren(el("strong", { text: "Something went wrong: " }), error.message || String(error));
  }

  return { ApiError, api, el, toDate, formatTime, timeCell, formatBound, formatCount, formatSeconds, stateBadge, isActive, requireSession, showSignin, showError, startPage };
})();
