// The job list: newest first, filtered by state, tag and label, refreshed
// while any listed job is still queued or running.
"use strict";

(() => {
  const { api, el, timeCell, formatBound, formatCount, stateBadge, isActive, showError, startPage } = fixq;
  const REFRESH_MS = 2000;
  const PAGE_SIZE = 50;

  const rows = document.getElementById("job-rows");
  const live = document.getElementById("live");
  const older = document.getElementById("older");
  const filters = document.getElementById("filters");
  let timer = null;
  let olderCursor = null;
  let olderJobs = [];

  function query(cursor) {
    const params = new URLSearchParams();
    for (const name of ["state", "tag", "label"]) {
      const value = filters.elements[name].value.trim();
      if (value) params.set(name, value);
    }
    params.set("limit", String(PAGE_SIZE));
    if (cursor) params.set("cursor", cursor);
    return `/v1/jobs?${params}`;
  }

  function row(job) {
    const label = job.label || "(no label)";
    return el(
      "tr",
      { "data-job": job.id, "data-state": job.state },
      el("td", {}, el("a", { href: `/jobs/${encodeURIComponent(job.id)}`, text: label }), el("span", { class: "jobid", text: job.id })),
      el("td", {}, (job.tags || []).map((tag) => el("span", { class: "tag", text: tag }))),
      el("td", { text: job.owner || "—" }),
      el("td", {}, stateBadge(job.state)),
      el("td", { class: "num", text: formatCount(job.iterations ?? (job.progress || {}).iteration) }),
      el("td", { class: "num", text: formatBound(job.error_bound ?? (job.progress || {}).error_bound) }),
      el("td", { class: "when" }, timeCell(job.submitted_at)),
      el("td", { class: "when" }, timeCell(job.finished_at)),
    );
  }

  function render(jobs) {
    const shown = new Set(jobs.map((job) => job.id));
    const all = jobs.concat(olderJobs.filter((job) => !shown.has(job.id)));
    rows.replaceChildren(...all.map(row));
    document.getElementById("no-jobs").classList.toggle("hidden", all.length > 0);
    return all;
  }

  async function refresh() {
    clearTimeout(timer);
    try {
      const page = await api(query());
      const all = render(page.data);
      if (!olderJobs.length) olderCursor = page.next;
      older.classList.toggle("hidden", !olderCursor);
      const active = all.filter((job) => isActive(job.state)).length;
      const now = new Date().toLocaleTimeString();
      if (active) {
        live.textContent = `${active} active — refreshing every ${REFRESH_MS / 1000} s (last ${now})`;
        timer = setTimeout(refresh, REFRESH_MS);
      } else {
        live.textContent = `no active jobs — updated ${now}`;
      }
      document.getElementById("problem").classList.add("hidden");
    } catch (error) {
      showError("problem", error);
      timer = setTimeout(refresh, REFRESH_MS * 5);
    }
  }

  async function showOlder() {
    older.disabled = true;
    try {
      const page = await api(query(olderCursor));
      olderJobs = olderJobs.concat(page.data);
      olderCursor = page.next;
      older.classList.toggle("hidden", !olderCursor);
      await refresh();
    } catch (error) {
      showError("problem", error);
    } finally {
      older.disabled = false;
    }
  }

  async function submitExample(name, button) {
    button.disabled = true;
    try {
      const document_ = await api(`/v1/examples/${encodeURIComponent(name)}`);
      const job = await api("/v1/jobs", {
        method: "POST",
        headers: { "Content-Type": "application/json" },
        body: JSON.stringify(document_),
      });
      window.location.assign(`/jobs/${encodeURIComponent(job.id)}`);
    } catch (error) {
      showError("problem", error);
      button.disabled = false;
    }
  }

  async function showExamples() {
    const box = document.getElementById("examples");
    try {
      const examples = (await api("/v1/examples")).data;
      box.replaceChildren(
        ...examples.map((example) => {
          const button = el("button", { type: "button", class: "quiet", text: "solve it" });
          button.addEventListener("click", () => submitExample(example.name, button));
          return el(
            "div",
            { class: "example", "data-example": example.name },
            el("span", { class: "label", text: example.label }),
            example.description ? el("span", { text: example.description }) : null,
            el("span", { class: "meta", text: `${example.kind} · ${formatCount(example.points)} points · ${example.name}.json` }),
            button,
          );
        }),
      );
    } catch (error) {
      box.replaceChildren(el("p", { class: "muted", text: `The examples could not be loaded: ${error.message}` }));
    }
  }

  function readFiltersFromAddress() {
    const params = new URLSearchParams(window.location.search);
    for (const name of ["state", "tag", "label"]) filters.elements[name].value = params.get(name) || "";
  }

  filters.addEventListener("submit", (event) => {
    event.preventDefault();
    const params = new URLSearchParams();
    for (const name of ["state", "tag", "label"]) {
      const value = filters.elements[name].value.trim();
      if (value) params.set(name, value);
    }
    history.replaceState(null, "", params.toString() ? `/?${params}` : "/");
    olderJobs = [];
    olderCursor = null;
    refresh();
  });
  older.addEventListener("click", showOlder);

  startPage(async () => {
    readFiltersFromAddress();
    refresh();
    showExamples();
  });
})();
