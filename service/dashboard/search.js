// A search's progress on the job page: a row per trial (the unknowns, the residuals, the inner solve's
// tolerance, status, iterations and error bound), live while the job runs and complete at the end, and the
// largest residual of each trial on a log scale. The trials are the job's log entries that carry a
// `search_trial`; the summary is the job record's `search`. Kept apart from job.js: it reads the log by pages.
"use strict";

(() => {
  const { api, el, formatBound, formatCount, formatSeconds, isActive, startPage } = fixq;
  const POLL_MS = 2000;
  const PAGE = 500;
  const SVG = "http://www.w3.org/2000/svg";

  const jobId = decodeURIComponent(window.location.pathname.split("/")[2] || "");
  const base = `/v1/jobs/${encodeURIComponent(jobId)}`;
  const trials = new Map();
  let cursor = 0;
  let isSearch = null; // unknown until the first log entry or the record's summary says

  async function refresh() {
    let record;
    try {
      record = await api(base);
    } catch (error) {
      setTimeout(refresh, POLL_MS * 3);
      return;
    }
    if (record.search) isSearch = true;
    if (isSearch !== false) await readLog();
    if (isSearch) render(record);
    if (isActive(record.state) && isSearch !== false) setTimeout(refresh, POLL_MS);
  }

  async function readLog() {
    try {
      for (;;) {
        // Until it is known to be a search, one entry is enough to tell.
        const limit = isSearch ? PAGE : 1;
        const page = await api(`${base}/log?cursor=${cursor}&limit=${limit}`);
        for (const entry of page.data) {
          if (!entry.search_trial) {
            if (isSearch === null) isSearch = false;
            continue;
          }
          isSearch = true;
          // After a resume the log holds the trials again from the checkpoint: later ones are superseded.
          for (const number of trials.keys()) if (number > entry.iteration) trials.delete(number);
          trials.set(entry.iteration, entry.search_trial);
        }
        cursor += page.data.length;
        if (page.next === null || page.next === undefined || isSearch === false) break;
      }
    } catch (error) {
      // The log may be gone (expired) or not yet readable: the record's summary is still shown.
    }
  }

  function render(record) {
    document.getElementById("search-card").classList.remove("hidden");
    const rows = [...trials.entries()].sort((a, b) => a[0] - b[0]);
    renderSummary(record, rows.length);
    renderTable(rows);
    drawChart(rows);
  }

  function renderSummary(record, made) {
    const summary = record.search;
    const parts = [];
    if (!summary) {
      parts.push(isActive(record.state) ? `Searching: ${formatCount(made)} trials so far.` : `${formatCount(made)} trials.`);
    } else {
      const found = Object.entries(summary.unknowns || {}).map(([name, value]) => `${name} = ${Number(value).toPrecision(10)}`).join(", ");
      const residuals = (summary.residuals || []).map((value) => formatBound(value)).join(", ");
      // Each status in the README's words ("Searches: equilibria and calibrations in one job"); none but
      // converged is a point found.
      const nearest = nearestTrial();
      const words = {
        converged: `Found ${found}: every condition within the search's tolerance (residuals ${residuals}).`,
        not_met: `Not met: the search stopped at ${found} (residuals ${residuals}) without every condition within the tolerance; the point is not a solution (see the warnings).`,
        max_trials: `Stopped after search.max_trials solves at ${found} (residuals ${residuals}), not within the tolerance; the point is not a solution.`,
        max_iterations: `Stopped: a solve used up solver.max_iterations at ${found} (residuals ${residuals}); the point is not a solution.`,
        time_limit: `Stopped: the time limit ran out during a solve at ${found} (residuals ${residuals}); the point is not a solution.`,
        no_root: `No sign change: the condition has the same sign at every trial, the bracket's ends included, so no root was found${nearest ? ` (nearest zero: ${nearest})` : ""}; see the error.`,
        canceled: `Canceled; the last trial made was at ${found} (residuals ${residuals}), not a solution.`,
        failed: `Failed; the last trial made was at ${found} (residuals ${residuals}), not a solution; see the error.`,
      };
      parts.push(words[summary.status] || `Search ${summary.status}: ${found} (residuals ${residuals}).`);
      parts.push(`${formatCount(summary.trials)} trials.`);
    }
    document.getElementById("search-summary").textContent = parts.join(" ");
  }

  // The trial whose largest |residual| is smallest, as "r = ..., residual ..." (null before any trial).
  function nearestTrial() {
    let best = null;
    for (const trial of trials.values()) {
      const size = Math.max(...trial.residuals.map((value) => Math.abs(value)));
      if (best === null || size < best[0]) best = [size, trial];
    }
    if (best === null) return null;
    const at = Object.entries(best[1].unknowns).map(([name, value]) => `${name} = ${Number(value).toPrecision(10)}`).join(", ");
    return `${at}, residual ${best[1].residuals.map((value) => formatBound(value)).join(", ")}`;
  }

  function renderTable(rows) {
    const first = rows.length ? rows[0][1] : null;
    const unknowns = first ? Object.keys(first.unknowns) : [];
    const conditions = first ? first.residuals.length : 0;
    const head = ["trial", ...unknowns, ...Array.from({ length: conditions }, (_, k) => (conditions > 1 ? `residual ${k + 1}` : "residual")),
      "inner tolerance", "inner status", "iterations", "error bound", "stationary residual", "seconds"];
    const table = document.getElementById("search-trials");
    table.querySelector("thead").replaceChildren(el("tr", {}, ...head.map((text) => el("th", { text }))));
    table.querySelector("tbody").replaceChildren(
      ...rows.map(([number, trial]) => el("tr", { "data-trial": String(number) },
        el("td", { class: "num", text: String(number) }),
        ...unknowns.map((name) => el("td", { class: "num mono", text: Number(trial.unknowns[name]).toPrecision(10) })),
        ...trial.residuals.map((value) => el("td", { class: "num", text: formatBound(value) })),
        el("td", { class: "num", text: formatBound(trial.inner_tolerance) }),
        el("td", { text: trial.inner_status }),
        el("td", { class: "num", text: formatCount(trial.iterations) }),
        el("td", { class: "num", text: formatBound(trial.error_bound) }),
        el("td", { class: "num", text: formatBound(trial.stationary_residual) }),
        el("td", { class: "num", text: formatSeconds(trial.seconds) }),
      )),
    );
  }

  function svg(tag, attributes = {}, text) {
    const node = document.createElementNS(SVG, tag);
    for (const [name, value] of Object.entries(attributes)) node.setAttribute(name, String(value));
    if (text !== undefined) node.textContent = text;
    return node;
  }

  // The largest |residual| of each trial against its number, log scale.
  function drawChart(rows) {
    const chart = document.getElementById("search-chart");
    chart.replaceChildren();
    const points = rows.map(([number, trial]) => [number, Math.max(...trial.residuals.map((value) => Math.abs(value)))])
      .filter(([, value]) => Number.isFinite(value) && value > 0);
    if (!points.length) {
      chart.append(svg("text", { x: 360, y: 130, "text-anchor": "middle" }, "waiting for the first trial"));
      return;
    }
    const margin = { left: 64, right: 16, top: 12, bottom: 36 };
    const width = 720 - margin.left - margin.right;
    const height = 260 - margin.top - margin.bottom;
    const logs = points.map(([, value]) => Math.log10(value));
    const low = Math.floor(Math.min(...logs));
    const high = Math.max(Math.ceil(Math.max(...logs)), low + 1);
    const last = Math.max(points[points.length - 1][0], 2);
    const x = (number) => margin.left + ((number - 1) / (last - 1)) * width;
    const y = (value) => margin.top + (1 - (Math.log10(value) - low) / (high - low)) * height;
    const step = Math.max(1, Math.ceil((high - low) / 6));
    for (let power = low; power <= high; power += step) {
      chart.append(svg("line", { class: "gridline", x1: margin.left, x2: margin.left + width, y1: y(10 ** power), y2: y(10 ** power) }));
      chart.append(svg("text", { x: margin.left - 6, y: y(10 ** power) + 4, "text-anchor": "end" }, `1e${power}`));
    }
    const every = Math.max(1, Math.ceil(last / 12));
    for (let number = 1; number <= last; number += every) {
      chart.append(svg("text", { x: x(number), y: margin.top + height + 16, "text-anchor": "middle" }, String(number)));
    }
    chart.append(svg("text", { x: margin.left + width / 2, y: 256, "text-anchor": "middle" }, "trial"));
    chart.append(svg("text", { x: 14, y: margin.top + height / 2, "text-anchor": "middle", transform: `rotate(-90 14 ${margin.top + height / 2})` }, "largest |residual|"));
    const path = points.map(([number, value], k) => `${k ? "L" : "M"}${x(number).toFixed(1)} ${y(value).toFixed(1)}`).join(" ");
    chart.append(svg("path", { d: path, fill: "none", stroke: "#c4572b", "stroke-width": 2, "data-series": "residual" }));
    for (const [number, value] of points) {
      const dot = svg("circle", { cx: x(number), cy: y(value), r: 3.5, fill: "#c4572b", "data-trial": number });
      dot.append(svg("title", {}, `trial ${number}: ${formatBound(value)}`));
      chart.append(dot);
    }
  }

  startPage(refresh);
})();
