// What moved between two finished jobs: GET /v1/jobs/{id}/changes?since=OTHER in words and
// tables, with the picture of the value function's change.
"use strict";

(() => {
  const { api, el, formatBound, formatCount, showError, startPage } = fixq;

  const jobId = decodeURIComponent(window.location.pathname.split("/")[2] || "");
  const since = (new URLSearchParams(window.location.search).get("since") || "").trim();
  const base = `/v1/jobs/${encodeURIComponent(jobId)}`;
  const query = `since=${encodeURIComponent(since)}`;
  const LARGEST_SHOWN = 3;

  const number = (value) => (typeof value === "number" ? formatBound(value) : String(value ?? "—"));
  const signed = (value) => (typeof value === "number" && value > 0 ? `+${formatBound(value)}` : number(value));
  const at = (point) => Object.entries(point || {}).map(([name, value]) => `${name} = ${number(value)}`).join(", ");

  function jobLink(id, node) {
    node.textContent = id || "—";
    if (id) node.href = `/jobs/${encodeURIComponent(id)}`;
  }

  function facts(answer) {
    const value = answer.value;
    const bounds = answer.error_bounds;
    const verdict = { true: "within them: noise, not a change", false: "larger than both together: a real change" };
    return [
      ["largest value change", value.sup_norm === null ? "no point could be compared" : `${signed(value.largest_change)} at ${at(value.at)}`],
      ["value there", value.sup_norm === null ? null : `${number(value.since)} → ${number(value.now)}`],
      ["mean value change", value.mean_change === null ? null : signed(value.mean_change)],
      ["error bounds", bounds.sum === null ? null : `${number(bounds.now)} + ${number(bounds.since)} = ${number(bounds.sum)}`],
      ["verdict", verdict[answer.within_error_bounds] || null],
      ["structure", answer.same_structure ? "the same grids, shocks and choices" : "differs (see below)"],
      ["compared on", answer.interpolated ? "this job's grid, the earlier job interpolated onto it" : "the same grid"],
      ["points compared", `${formatCount(answer.points_compared)} of ${formatCount(answer.points)}`],
    ];
  }

  function policyRow(choice, block) {
    const share = block.changed_share === null ? "—" : `${(100 * block.changed_share).toFixed(1)}%`;
    const where = Object.entries(block.ranges || {}).map(([name, span]) =>
      span.length === 2 && span.every((v) => typeof v === "number") ? `${name} ${number(span[0])} to ${number(span[1])}` : `${name}: ${span.join(", ")}`);
    const largest = (block.largest || []).slice(0, LARGEST_SHOWN).map((point) => `${at(point.at)}: ${number(point.since)} → ${number(point.now)}`);
    return el("tr", { "data-choice": choice },
      el("td", { class: "mono", text: choice }),
      el("td", { class: "num", text: `${share} (${formatCount(block.changed_points)} of ${formatCount(block.points)})` }),
      el("td", { text: where.join("; ") || "nowhere" }),
      el("td", { text: largest.join("; ") || "—" }));
  }

  function meanRows(answer) {
    const rows = [];
    for (const [key, word] of [["stationary_means", "stationary distribution"], ["simulated_means", "simulation"]]) {
      for (const [name, change] of Object.entries(answer[key] || {})) {
        rows.push(el("tr", {},
          el("td", { text: word }), el("td", { class: "mono", text: name }),
          el("td", { class: "num", text: number(change.since) }), el("td", { class: "num", text: number(change.now) }),
          el("td", { class: "num", text: signed(change.change) })));
      }
    }
    return rows;
  }

  function differences(answer) {
    const items = (answer.structure_changes || []).map((change) => `${change.part} ${change.name}: ${change.what}`
      + (change.now && change.now.points !== undefined ? ` (${change.since.points} points on [${number(change.since.min)}, ${number(change.since.max)}] → ${change.now.points} on [${number(change.now.min)}, ${number(change.now.max)}])` : ""));
    const changes = answer.document_changes || { paths: [], more: 0 };
    for (const path of changes.paths) items.push(`${path.path}: ${JSON.stringify(path.since)} → ${JSON.stringify(path.now)}`);
    if (changes.more) items.push(`and ${changes.more} more paths`);
    return items;
  }

  function show(id, nodes, holder) {
    document.getElementById(id).replaceChildren(...nodes);
    document.getElementById(holder).classList.toggle("hidden", !nodes.length);
  }

  function render(answer) {
    document.getElementById("change-summary").replaceChildren(
      ...facts(answer).filter(([, text]) => text !== null).flatMap(([name, text]) => [el("dt", { text: name }), el("dd", { text })]));
    show("change-notes", (answer.notes || []).map((text) => el("li", { text })), "change-notes-card");
    show("policy-rows", Object.entries(answer.policy || {}).map(([choice, block]) => policyRow(choice, block)), "policy-card");
    show("mean-rows", meanRows(answer), "means-card");
    show("differences", differences(answer).map((text) => el("li", { text })), "differences-card");
    const plot = document.getElementById("change-plot");
    plot.src = `${base}/plots/changes.svg?${query}`;
    plot.classList.remove("hidden");
    const links = [
      ["changes (JSON)", `${base}/changes?${query}`, `${jobId}-changes-since-${since}.json`],
      ["value change plot (PNG)", `${base}/plots/changes.png?${query}`, `${jobId}-changes-since-${since}.png`],
      ["value change plot (SVG)", `${base}/plots/changes.svg?${query}`, `${jobId}-changes-since-${since}.svg`],
    ];
    show("change-downloads", links.map(([text, href, download]) => el("a", { class: "button quiet", href, download, text })), "change-downloads-card");
    document.body.dataset.changes = "shown";
  }

  startPage(async () => {
    document.title = `changes of ${jobId} · fixq`;
    jobLink(jobId, document.getElementById("now-link"));
    jobLink(since, document.getElementById("since-link"));
    document.getElementById("since").value = since;
    document.getElementById("since-form").action = window.location.pathname;
    if (!since) {
      showError("problem", new Error("Enter the id of an earlier job of yours to compare this job with."));
      return;
    }
    try {
      render(await api(`${base}/changes?${query}`));
    } catch (error) {
      showError("problem", error);
      document.body.dataset.changes = "refused";
    }
  });
})();
