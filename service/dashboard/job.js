// One job: its record, a convergence plot fed live by the log's event stream,
// and once solved the value and policy plots (and Euler-equation errors when measured),
// diagnostics and downloads.
"use strict";

(() => {
  const { api, el, timeCell, formatBound, formatCount, formatSeconds, stateBadge, isActive, showError, startPage } = fixq;
  const POLL_MS = 2000;
  const SVG = "http://www.w3.org/2000/svg";
  const COLOURS = { distance: "#1b7f79", error_bound: "#c4572b", tolerance: "#23303d" };

  const jobId = decodeURIComponent(window.location.pathname.split("/")[2] || "");
  const base = `/v1/jobs/${encodeURIComponent(jobId)}`;
  const entries = new Map();
  let job = null;
  let tolerance = null;
  let pollTimer = null;
  let stream = null;
  let summaryShown = false;
  let drawPending = false;

  async function loadJob() {
    clearTimeout(pollTimer);
    try {
      job = await api(base);
    } catch (error) {
      if (error.status === 404) {
        document.getElementById("job-label").textContent = "No such job";
        showError("problem", new Error(`There is no job with id ${jobId} (or it belongs to another key).`));
        return;
      }
      showError("problem", error);
      pollTimer = setTimeout(loadJob, POLL_MS * 3);
      return;
    }
    document.getElementById("problem").classList.add("hidden");
    renderHead();
    renderFacts();
    if (!entries.size) drawChart();
    if (job.state === "failed") renderFailure();
    if (job.state === "canceled") renderCanceled();
    if (job.state === "done" && !summaryShown) {
      summaryShown = true;
      loadSummary();
    }
    if (isActive(job.state)) pollTimer = setTimeout(loadJob, POLL_MS);
  }

  function renderHead() {
    document.title = `${job.label || job.id} · fixq`;
    document.getElementById("job-label").textContent = job.label || "(no label)";
    document.getElementById("job-state").replaceChildren(stateBadge(job.state));
    document.getElementById("job-id").textContent = job.id;
    document.getElementById("job-tags").replaceChildren(
      ...((job.tags || []).length ? job.tags.map((tag) => el("span", { class: "tag", text: tag })) : [el("span", { class: "muted", text: "no tags" })]),
    );
    document.getElementById("cancel").classList.toggle("hidden", !isActive(job.state));
  }

  function renderFacts() {
    const progress = job.progress || {};
    const estimate = job.estimate || {};
    const facts = [
      ["state", stateBadge(job.state)],
      ["owner", job.owner || "—"],
      ["submitted", timeCell(job.submitted_at)],
      ["started", timeCell(job.started_at)],
      ["finished", timeCell(job.finished_at)],
      ["iterations", formatCount(job.iterations ?? progress.iteration)],
      ["distance", formatBound(progress.distance)],
      ["error bound", formatBound(job.error_bound ?? progress.error_bound)],
      ["points", estimate.points !== undefined ? formatCount(estimate.points) : null],
      ["choice points", estimate.choice_points !== undefined ? formatCount(estimate.choice_points) : null],
      ["priority", job.priority || null],
      ["attempts", job.attempts > 1 ? formatCount(job.attempts) : null],
      ["reused", job.reused ? "yes: an identical document was solved before" : null],
    ];
    document.getElementById("facts").replaceChildren(
      ...facts.filter(([, value]) => value !== null && value !== undefined).flatMap(([name, value]) => [el("dt", { text: name }), el("dd", {}, value)]),
    );
  }

  function renderFailure() {
    const list = document.getElementById("failure-list");
    const error = job.error;
    const items = [];
    if (!error) items.push("The job failed without a recorded reason; the worker's log may say more.");
    else if (typeof error === "string") items.push(error);
    else if ((error.errors || []).length) {
      for (const fault of error.errors) items.push(fault.path ? `${fault.path}: ${fault.message}` : fault.message);
    } else {
      items.push(error.detail || error.title || "no reason recorded");
    }
    list.replaceChildren(...items.map((text) => el("li", { text })));
    document.getElementById("failure").classList.remove("hidden");
  }

  function renderCanceled() {
    const iteration = job.iterations ?? (job.progress || {}).iteration;
    setNotes([
      iteration ? `This job was canceled after ${formatCount(iteration)} iterations; no result was stored.` : "This job was canceled before it produced a result.",
    ]);
  }

  function addEntry(entry) {
    // After a resume the log restarts past the checkpoint: later entries are superseded.
    for (const iteration of entries.keys()) if (iteration > entry.iteration) entries.delete(iteration);
    entries.set(entry.iteration, entry);
    if (!drawPending) {
      drawPending = true;
      requestAnimationFrame(() => {
        drawPending = false;
        drawChart();
      });
    }
  }

  function followLog() {
    if (typeof EventSource === "undefined") return pollLog();
    stream = new EventSource(`${base}/log`);
    stream.addEventListener("entry", (event) => addEntry(JSON.parse(event.data)));
    stream.addEventListener("end", () => {
      stream.close();
      stream = null;
      loadJob();
    });
    stream.addEventListener("error", () => {
      // A refused stream (CLOSED) will not reconnect by itself: read the log as JSON instead.
      if (stream && stream.readyState === EventSource.CLOSED) {
        stream = null;
        pollLog();
      }
    });
  }

  async function pollLog() {
    try {
      let cursor = null;
      do {
        const page = await api(`${base}/log${cursor ? `?cursor=${encodeURIComponent(cursor)}` : ""}`);
        for (const entry of page.data) addEntry(entry);
        cursor = page.next;
      } while (cursor);
    } catch (error) {
      showError("problem", error);
    }
    if (!job || isActive(job.state)) setTimeout(pollLog, POLL_MS);
  }

  function svg(tag, attributes = {}, text) {
    const node = document.createElementNS(SVG, tag);
    for (const [name, value] of Object.entries(attributes)) node.setAttribute(name, value);
    if (text !== undefined) node.textContent = text;
    return node;
  }

  function niceStep(span, count) {
    const raw = span / Math.max(count, 1);
    const magnitude = 10 ** Math.floor(Math.log10(raw));
    const fraction = raw / magnitude;
    return (fraction <= 1 ? 1 : fraction <= 2 ? 2 : fraction <= 5 ? 5 : 10) * magnitude;
  }

  function drawChart() {
    const chart = document.getElementById("convergence");
    const width = 720;
    const height = 320;
    const margin = { left: 62, right: 18, top: 16, bottom: 42 };
    const plotWidth = width - margin.left - margin.right;
    const plotHeight = height - margin.top - margin.bottom;
    const log = [...entries.values()].sort((a, b) => a.iteration - b.iteration);
    chart.replaceChildren();
    if (!log.length) {
      chart.append(svg("text", { x: width / 2, y: height / 2, "text-anchor": "middle" }, job && isActive(job.state) ? "waiting for the first iteration…" : "no iterations logged"));
      return;
    }
    const positives = log.flatMap((e) => [e.distance, e.error_bound]).filter((v) => Number.isFinite(v) && v > 0);
    if (tolerance > 0) positives.push(tolerance);
    let low = Math.floor(Math.log10(Math.min(...positives, 1)));
    let high = Math.ceil(Math.log10(Math.max(...positives, 1e-300)));
    if (!Number.isFinite(low) || !Number.isFinite(high)) [low, high] = [-6, 0];
    if (high <= low) high = low + 1;
    const first = Math.min(log[0].iteration, 1);
    const last = Math.max(log[log.length - 1].iteration, first + 1);
    const x = (iteration) => margin.left + ((iteration - first) / (last - first)) * plotWidth;
    const y = (value) => margin.top + ((high - Math.log10(value)) / (high - low)) * plotHeight;

    const grid = svg("g", {});
    const decadeStep = Math.max(1, Math.ceil((high - low) / 8));
    for (let decade = low; decade <= high; decade += decadeStep) {
      const ty = y(10 ** decade);
      grid.append(svg("line", { class: "gridline", x1: margin.left, x2: width - margin.right, y1: ty, y2: ty }));
      grid.append(svg("text", { x: margin.left - 8, y: ty + 4, "text-anchor": "end" }, `1e${decade}`));
    }
    const step = Math.max(1, niceStep(last - first, 7));
    for (let tick = Math.ceil(first / step) * step; tick <= last; tick += step) {
      const tx = x(tick);
      grid.append(svg("line", { class: "gridline", x1: tx, x2: tx, y1: margin.top, y2: height - margin.bottom }));
      grid.append(svg("text", { x: tx, y: height - margin.bottom + 16, "text-anchor": "middle" }, formatCount(tick)));
    }
    chart.append(grid);
    chart.append(svg("line", { x1: margin.left, x2: margin.left, y1: margin.top, y2: height - margin.bottom, stroke: "#23303d" }));
    chart.append(svg("line", { x1: margin.left, x2: width - margin.right, y1: height - margin.bottom, y2: height - margin.bottom, stroke: "#23303d" }));
    chart.append(svg("text", { x: margin.left + plotWidth / 2, y: height - 6, "text-anchor": "middle" }, "iteration"));
    chart.append(svg("text", { x: 14, y: margin.top + plotHeight / 2, "text-anchor": "middle", transform: `rotate(-90 14 ${margin.top + plotHeight / 2})` }, "sup-norm (log scale)"));

    if (tolerance > 0) {
      chart.append(svg("line", { x1: margin.left, x2: width - margin.right, y1: y(tolerance), y2: y(tolerance), stroke: COLOURS.tolerance, "stroke-dasharray": "5 4" }));
    }
    for (const key of ["distance", "error_bound"]) {
      let path = "";
      let pen = "M";
      for (const entry of log) {
        const value = entry[key];
        if (!(Number.isFinite(value) && value > 0)) {
          pen = "M";
          continue;
        }
        path += `${pen}${x(entry.iteration).toFixed(1)},${y(value).toFixed(1)} `;
        pen = "L";
      }
      chart.append(svg("path", { d: path, fill: "none", stroke: COLOURS[key], "stroke-width": 2, "data-series": key }));
      if (log.length <= 40) {
        for (const entry of log) {
          if (Number.isFinite(entry[key]) && entry[key] > 0) chart.append(svg("circle", { cx: x(entry.iteration), cy: y(entry[key]), r: 2.6, fill: COLOURS[key] }));
        }
      }
    }
    const legend = [["distance", "distance between iterates"], ["error_bound", "certified error bound"]];
    if (tolerance > 0) legend.push(["tolerance", `tolerance ${formatBound(tolerance)}`]);
    legend.forEach(([key, name], i) => {
      const ly = margin.top + 10 + i * 17;
      const lx = width - margin.right - 190;
      chart.append(svg("line", { x1: lx, x2: lx + 22, y1: ly, y2: ly, stroke: COLOURS[key], "stroke-width": 2, "stroke-dasharray": key === "tolerance" ? "5 4" : "none" }));
      chart.append(svg("text", { x: lx + 28, y: ly + 4 }, name));
    });

    const guide = svg("line", { x1: 0, x2: 0, y1: margin.top, y2: height - margin.bottom, stroke: "#5d6b75", "stroke-dasharray": "2 3", visibility: "hidden" });
    chart.append(guide);
    const lastEntry = log[log.length - 1];
    const readout = document.getElementById("readout");
    const describe = (e) =>
      `iteration ${formatCount(e.iteration)}: distance ${formatBound(e.distance)}, error bound ${formatBound(e.error_bound)}` +
      (e.policy_changes !== undefined ? `, policy changes ${formatCount(e.policy_changes)}` : "") +
      (e.seconds !== undefined ? `, ${formatSeconds(e.seconds)}` : "");
    readout.textContent = describe(lastEntry);
    chart.onmousemove = (event) => {
      const box = chart.getBoundingClientRect();
      const px = ((event.clientX - box.left) / box.width) * width;
      const iteration = first + ((px - margin.left) / plotWidth) * (last - first);
      let nearest = log[0];
      for (const entry of log) if (Math.abs(entry.iteration - iteration) < Math.abs(nearest.iteration - iteration)) nearest = entry;
      guide.setAttribute("x1", x(nearest.iteration));
      guide.setAttribute("x2", x(nearest.iteration));
      guide.setAttribute("visibility", "visible");
      readout.textContent = describe(nearest);
    };
    chart.onmouseleave = () => {
      guide.setAttribute("visibility", "hidden");
      readout.textContent = describe(lastEntry);
    };
  }

  async function loadSummary() {
    let summary;
    try {
      summary = await api(`${base}/plots`);
    } catch (error) {
      showError("problem", error);
      return;
    }
    if (summary.tolerance > 0) {
      tolerance = summary.tolerance;
      drawChart();
    }
    setNotes(plainWords(summary));
    const warnings = (summary.diagnostics || {}).warnings || [];
    document.getElementById("warning-list").replaceChildren(...warnings.map((text) => el("li", { text })));
    document.getElementById("warnings").classList.toggle("hidden", !warnings.length);
    showDownloads(summary);
    showPictures(summary);
  }

  function setNotes(notes) {
    document.getElementById("notes").replaceChildren(...notes.map((text) => el("li", { text })));
    document.getElementById("outcome").classList.toggle("hidden", !notes.length);
  }

  function plainWords(summary) {
    const notes = [];
    const bound = formatBound(summary.error_bound);
    const effort =
      `${formatCount(summary.iterations)} iterations` +
      (summary.evaluation_steps ? ` and ${formatCount(summary.evaluation_steps)} evaluation steps` : "") +
      (summary.linear_solves ? ` and ${formatCount(summary.linear_solves)} linear solves` : "") +
      (summary.method ? ` (${summary.method.replace(/_/g, " ")})` : "") +
      (summary.seconds !== undefined ? `, ${formatSeconds(summary.seconds)} of solving` : "");
    if (summary.method === "backward_induction") {
      const solved = formatCount(summary.periods ?? summary.iterations);
      notes.push(summary.status === "time_limit"
        ? `Stopped at the time limit (solver.time_limit_s) after ${solved} periods of backward induction: the value and policy shown are those of the last ${solved} periods, exact up to rounding (error bound ${bound}).`
        : `Solved by backward induction: one exact Bellman step for each of the ${solved} periods, from the terminal value back to period 0, so the value shown is exact up to rounding (error bound ${bound}). The pictures show value and policy by period.`);
    } else if (summary.status === "converged") {
      notes.push(`Converged: at every point the value function shown is within ${bound} of the exact fixed point of the discretized problem (the certified error bound). It took ${effort}.`);
    } else if (summary.status === "max_iterations") {
      notes.push(`Stopped at the iteration limit (solver.max_iterations) after ${effort}, before reaching the tolerance. The value function is still certified to be within ${bound} of the fixed point. Raise the limit, or continue from this job with solver.initial = {"job": "${jobId}"}.`);
    } else if (summary.status === "time_limit") {
      notes.push(`Stopped at the time limit (solver.time_limit_s) after ${effort}, before reaching the tolerance. The value function is still certified to be within ${bound} of the fixed point. Allow more time, or continue from this job with solver.initial = {"job": "${jobId}"}.`);
    } else if (summary.status) {
      notes.push(`Finished with status "${summary.status}" after ${effort}; error bound ${bound}.`);
    }
    const diagnostics = summary.diagnostics || {};
    if (Number.isFinite(diagnostics.observed_rate)) {
      notes.push(`Successive distances shrank by a factor of about ${diagnostics.observed_rate.toFixed(3)} per iteration near the end.`);
    }
    if (diagnostics.verification && summary.method === "backward_induction") {
      const held = diagnostics.verification.hints_held;
      notes.push(`In every period the hinted search was checked by the unrestricted Bellman step it seeded, whose value was kept: the hints ${held === false ? `did not hold in ${formatCount(diagnostics.verification.periods_broken)} periods` : "held"}.`);
    } else if (diagnostics.verification) {
      const held = diagnostics.verification.hints_held;
      notes.push(`The hints were checked by one unrestricted application of the Bellman operator (a verification, not counted as an iteration): ${held === false ? "they did not hold, so the solve went on without them" : "they held"}.`);
    }
    if (diagnostics.taste_shocks) {
      const taste = diagnostics.taste_shocks;
      notes.push(`Taste shocks of scale ${formatBound(taste.scale)}: the value is the smoothed maximum over the choices, and every allowed choice has a probability (the policy shows the most probable). Euler's constant is not in the value; with location-zero shocks every value would be ${formatBound(taste.location_zero_offset)} higher.`);
    }
    if (diagnostics.resumed_from_iteration) {
      notes.push(`A worker stopped during this solve; another one resumed it from the checkpoint of iteration ${formatCount(diagnostics.resumed_from_iteration)}, so finished work was not lost.`);
    }
    // Means over the indices of tabular states or action labels say little; they are shown for grid models only.
    if (summary.layout !== "bars") {
      const means = Object.entries((summary.stationary || {}).means || {}).filter(([, value]) => Number.isFinite(value));
      if (means.length) {
        notes.push(`In the long run (the stationary distribution under the optimal policy) the averages are: ${means.map(([name, value]) => `${name} ${formatBound(value)}`).join(", ")}.`);
      }
    }
    const simulation = summary.simulation;
    if (summary.layout !== "bars" && simulation && simulation.summary) {
      const means = Object.entries(simulation.summary)
        .filter(([, stats]) => stats && Number.isFinite(stats.mean))
        .map(([name, stats]) => `${name} ${formatBound(stats.mean)} (sd ${formatBound(stats.sd)})`);
      if (means.length) notes.push(`Over ${formatCount(simulation.paths)} simulated paths of ${formatCount(simulation.periods)} periods the averages are: ${means.join(", ")}.`);
    }
    return notes;
  }

  function fillSelect(select, labels) {
    select.replaceChildren(...labels.map((label, i) => el("option", { value: String(i), text: label || String(i) })));
  }

  function showPictures(summary) {
    const plots = summary.plots || {};
    const valueImg = document.getElementById("value-plot");
    const policyImg = document.getElementById("policy-plot");
    const choiceSelect = document.getElementById("choice");
    const valueShock = document.getElementById("value-shock");
    const policyShock = document.getElementById("policy-shock");
    const heatmap = summary.layout === "heatmap";
    const shockLabels = summary.shock_labels || [];
    const choices = summary.choices || [];

    fillSelect(valueShock, shockLabels);
    fillSelect(policyShock, shockLabels);
    choiceSelect.replaceChildren(...choices.map((name) => el("option", { value: name, text: name })));
    document.getElementById("value-shock-box").classList.toggle("hidden", !(heatmap && shockLabels.length > 1));
    document.getElementById("policy-shock-box").classList.toggle("hidden", !(heatmap && shockLabels.length > 1));
    document.getElementById("choice-box").classList.toggle("hidden", choices.length < 2);

    const valueUrl = (fmt) => `${base}/plots/value.${fmt}${heatmap ? `?shock_index=${valueShock.value || 0}` : ""}`;
    const policyUrl = (fmt) => {
      const params = new URLSearchParams();
      if (choices.length) params.set("choice", choiceSelect.value || choices[0]);
      if (heatmap) params.set("shock_index", policyShock.value || "0");
      return `${base}/plots/policy.${fmt}?${params}`;
    };
    const update = () => {
      valueImg.src = valueUrl("svg");
      policyImg.src = policyUrl("svg");
      showDownloads(summary, valueUrl, policyUrl);
    };
    valueShock.onchange = update;
    policyShock.onchange = update;
    choiceSelect.onchange = update;
    if (plots.value !== false) update();
    showEulerErrors(summary);
    showChoiceProbabilities(summary);
    showLifeCycle(summary);
    document.getElementById("pictures").classList.remove("hidden");
  }

  // Models with taste shocks: the probabilities of one choice's values, drawn by the server.
  function showChoiceProbabilities(summary) {
    const shown = Boolean(summary.choice_probabilities);
    document.getElementById("probability-figure").classList.toggle("hidden", !shown);
    if (!shown) return;
    const choices = Object.keys(((summary.diagnostics || {}).taste_shocks || {}).choices || {});
    const shockLabels = summary.shock_labels || [];
    const choiceSelect = document.getElementById("probability-choice");
    const shockSelect = document.getElementById("probability-shock");
    choiceSelect.replaceChildren(...choices.map((name) => el("option", { value: name, text: name })));
    fillSelect(shockSelect, shockLabels);
    document.getElementById("probability-choice-box").classList.toggle("hidden", choices.length < 2);
    document.getElementById("probability-shock-box").classList.toggle("hidden", summary.layout === "bars" || shockLabels.length < 2);
    const update = () => {
      const params = new URLSearchParams();
      if (choices.length) params.set("choice", choiceSelect.value || choices[0]);
      if (summary.layout !== "bars") params.set("shock_index", shockSelect.value || "0");
      document.getElementById("probability-plot").src = `${base}/plots/choice_probabilities.svg?${params}`;
    };
    choiceSelect.onchange = update;
    shockSelect.onchange = update;
    update();
  }

  // The profile itself stays on the server, which draws it like the value and policy plots;
  // the summary carries the worst and mean errors, written beside the picture.
  function showEulerErrors(summary) {
    const errors = (summary.diagnostics || {}).euler_errors;
    const shown = Boolean(errors && summary.euler_profile);
    document.getElementById("euler-figure").classList.toggle("hidden", !shown);
    if (!shown) return;
    const power = (value) => [el("span", { text: "10" }), el("sup", { text: value.toFixed(2).replace("-", "−") })];
    const words = [];
    if (Number.isFinite(errors.max_log10)) {
      words.push("worst ", ...power(errors.max_log10), ", mean ", ...power(errors.mean_log10));
      if (Number.isFinite(errors.weighted_mean_log10)) words.push(", weighted by the stationary distribution ", ...power(errors.weighted_mean_log10));
      words.push(` over ${formatCount(errors.points)} test points`);
    } else {
      words.push("no test point could be measured");
    }
    if (errors.constrained) words.push(`; ${formatCount(errors.constrained)} constrained`);
    if (errors.undefined) words.push(`; ${formatCount(errors.undefined)} undefined`);
    document.getElementById("euler-summary").replaceChildren(...words.map((part) => (part instanceof Node ? part : document.createTextNode(part))));
    document.getElementById("euler-plot").src = `${base}/plots/euler_errors.svg`;
  }

  // A finite horizon's cohort (report.cohort): the means of the states and choices by period, drawn by the server.
  function showLifeCycle(summary) {
    document.getElementById("life-cycle-figure").classList.toggle("hidden", !summary.life_cycle);
    if (summary.life_cycle) document.getElementById("life-cycle-plot").src = `${base}/plots/life_cycle.svg`;
  }

  function showDownloads(summary, valueUrl, policyUrl) {
    const links = [
      ["result (JSON)", `${base}/result`, `${jobId}-result.json`],
      ["result table (CSV)", `${base}/result?format=csv`, `${jobId}-result.csv`],
      ["convergence log (JSON)", `${base}/log`, `${jobId}-log.json`],
      ["convergence plot (PNG)", `${base}/plots/convergence.png`, `${jobId}-convergence.png`],
      ["convergence plot (SVG)", `${base}/plots/convergence.svg`, `${jobId}-convergence.svg`],
    ];
    if (valueUrl) {
      links.push(["value plot (PNG)", valueUrl("png"), `${jobId}-value.png`]);
      links.push(["policy plot (PNG)", policyUrl("png"), `${jobId}-policy.png`]);
    }
    if (summary.euler_profile) links.push(["Euler-error plot (PNG)", `${base}/plots/euler_errors.png`, `${jobId}-euler-errors.png`]);
    if (summary.choice_probabilities) links.push(["choice-probability plot (PNG)", `${base}/plots/choice_probabilities.png`, `${jobId}-choice-probabilities.png`]);
    if (summary.life_cycle) links.push(["life-cycle plot (PNG)", `${base}/plots/life_cycle.png`, `${jobId}-life-cycle.png`]);
    document.getElementById("downloads").replaceChildren(...links.map(([text, href, download]) => el("a", { class: "button quiet", href, download, text })));
    document.getElementById("downloads-card").classList.remove("hidden");
    document.getElementById("compare").action = `/jobs/${encodeURIComponent(jobId)}/changes`;
    document.getElementById("compare-card").classList.remove("hidden");
  }

  async function cancel() {
    const button = document.getElementById("cancel");
    button.disabled = true;
    try {
      await api(base, { method: "DELETE" });
    } catch (error) {
      showError("problem", error);
    }
    button.disabled = false;
    loadJob();
  }

  document.getElementById("cancel").addEventListener("click", cancel);

  startPage(async () => {
    drawChart();
    await loadJob();
    if (job) followLog();
  });
})();
