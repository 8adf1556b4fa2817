// The jobs panel under the masthead of every page: every job the server holds (GET /api/jobs), its
// progress in the unit its work counts, time left, cancel, and a link to its result once done.
// Self-contained (pages load pellucid.js after it, or not at all).
"use strict";

(() => {
  const toggle = document.getElementById("jobs-toggle");
  const panel = document.getElementById("jobs-panel");
  if (!toggle || !panel) return;
  const list = document.getElementById("jobs-list");
  const count = document.getElementById("jobs-count");
  const empty = document.getElementById("jobs-empty");
  const more = document.getElementById("jobs-more");
  const errorBox = document.getElementById("jobs-error");
  const SHOWN = 30; // the newest jobs; older finished ones stay in GET /api/jobs
  const BUSY_MS = 1000, IDLE_MS = 5000;
  const TITLES = {
    occlusion: "Occlusion map", gradcam: "Grad-CAM map", integrated_gradients: "Integrated Gradients map",
    rise: "RISE map", smoothgrad: "SmoothGrad map", saliency: "Saliency map",
    gradient_x_input: "Gradient × input map", faithfulness: "Faithfulness curves",
    sanity: "Weight-randomisation check", audit: "Folder audit",
  };
  const STATES = { queued: "waiting", running: "running", done: "finished", failed: "failed", cancelled: "cancelled" };
  const rows = new Map(); // job id → its list item's parts
  const announce = document.getElementById("jobs-announce");
  const lastStates = new Map(); // job id → state at the last poll, to announce a job that ends
  let timer = null;
  let busy = false;

  function make(tag, cls, text) {
    const node = document.createElement(tag);
    if (cls) node.className = cls;
    if (text !== undefined) node.textContent = text;
    return node;
  }

  function int(n) { return Number(n).toLocaleString("en-US"); }

  // "1 pass", "1 patch position", "1 noisy copy": the server's units are plural.
  function counted(n, unit) {
    if (Number(n) !== 1) return `${int(n)} ${unit}`;
    const one = unit.endsWith("ies") ? unit.slice(0, -3) + "y" : unit.endsWith("sses") ? unit.slice(0, -2)
      : unit.endsWith("s") ? unit.slice(0, -1) : unit;
    return `1 ${one}`;
  }

  function duration(s) {
    if (s === null || s === undefined) return null;
    if (s < 1) return "under a second";
    if (s < 90) return Math.round(s) + " s";
    if (s < 5400) return Math.round(s / 60) + " min";
    return (s / 3600).toFixed(1) + " h";
  }

  function clock(t) {
    return t ? new Date(t * 1000).toLocaleTimeString("en-GB", { hour12: false }) : null;
  }

  function subject(job) {
    const parts = [];
    if (job.model) parts.push(job.model);
    if (job.kind === "audit") parts.push(job.run_id ? "run " + job.run_id : "run not stored yet");
    else if (job.image_name || job.image) parts.push(job.image_name || job.image.slice(0, 12) + "…");
    return parts.join(" · ") || job.description;
  }

  function progressLine(job) {
    const parts = [];
    if (job.kind === "audit" && job.phase && job.phase !== job.unit && job.state === "running") parts.push(job.phase);
    if (job.state === "queued") parts.push("waiting for a free worker");
    else if (job.state === "running") {
      parts.push(job.total ? `${int(job.done)} of ${counted(job.total, job.unit)}` : "starting");
      const left = job.seconds_left;
      if (left !== null && left !== undefined) {
        parts.push((left < 1 ? "less than a second left" : "about " + duration(left) + " left") +
                   (job.left_from === "estimate" ? " (estimated before it began)" : ""));
      }
    } else if (job.state === "done") {
      parts.push(`${counted(job.total, job.unit)} in ${duration(job.elapsed) || "no time"}` + (job.cached ? " (kept from before)" : ""));
    } else if (job.state === "cancelled") {
      parts.push(job.total ? `stopped after ${int(job.done)} of ${counted(job.total, job.unit)}` : "stopped before it began");
    } else if (job.state === "failed") {
      parts.push(job.error || "failed");
    }
    const times = [];
    if (job.started) times.push("started " + clock(job.started));
    if (job.finished) times.push("ended " + clock(job.finished));
    if (times.length) parts.push(times.join(", "));
    return parts.join(" · ");
  }

  function linkText(job) {
    if (job.kind === "audit") return "open the run";
    if (job.state === "done") return job.kind === "sanity" || job.kind === "faithfulness" ? "open the map and its check" : "open the map";
    return "open the image";
  }

  function build(job) {
    const item = make("li", "job-row");
    item.dataset.id = job.id;
    const head = make("div", "job-row-head");
    const title = make("strong", "job-title", TITLES[job.kind] || job.kind);
    const state = make("span", "job-state");
    head.append(title, state);
    const what = make("div", "job-subject");
    const bar = make("progress", "job-bar");
    bar.max = 1;
    const line = make("div", "job-line");
    const actions = make("div", "job-actions");
    const cancel = make("button", "secondary job-cancel", "Cancel");
    cancel.type = "button";
    cancel.setAttribute("aria-label", "Cancel " + (TITLES[job.kind] || job.kind) + ": " + job.description);
    cancel.addEventListener("click", () => cancelJob(job.id, cancel));
    const link = make("a", "job-link");
    actions.append(cancel, link);
    item.append(head, what, bar, line, actions);
    return { item, state, what, bar, line, cancel, link };
  }

  function update(parts, job) {
    parts.item.dataset.state = job.state;
    parts.item.dataset.kind = job.kind;
    parts.state.textContent = STATES[job.state] || job.state;
    parts.what.textContent = subject(job);
    parts.what.title = job.description;
    parts.bar.value = job.state === "done" ? 1 : job.fraction || 0;
    parts.bar.setAttribute("aria-label", "progress of " + (TITLES[job.kind] || job.kind));
    if (job.state === "queued") parts.bar.removeAttribute("value");
    parts.line.textContent = progressLine(job);
    const active = job.state === "queued" || job.state === "running";
    parts.cancel.hidden = !active;
    const showLink = Boolean(job.link) && job.state !== "failed";
    parts.link.hidden = !showLink;
    if (showLink) {
      parts.link.href = job.link;
      parts.link.textContent = linkText(job);
      parts.link.setAttribute("aria-label", linkText(job) + ": " + job.description);  // many rows share the text
    } else {
      parts.link.removeAttribute("href");
    }
  }

  function render(body) {
    const jobs = body.jobs.slice().sort((a, b) => (b.created || 0) - (a.created || 0)).slice(0, SHOWN);
    const seen = new Set();
    let previous = null;
    for (const job of jobs) {
      seen.add(job.id);
      let parts = rows.get(job.id);
      if (!parts) {
        parts = build(job);
        rows.set(job.id, parts);
        // Newest first; a row already shown never moves, so a focused Cancel button keeps its focus.
        if (previous) previous.item.after(parts.item); else list.prepend(parts.item);
      }
      update(parts, job);
      previous = parts;
    }
    for (const [id, parts] of rows) {
      if (!seen.has(id)) { parts.item.remove(); rows.delete(id); }
    }
    empty.hidden = jobs.length > 0;
    const hiddenCount = body.jobs.length - jobs.length;
    more.hidden = hiddenCount <= 0;
    more.textContent = hiddenCount > 0 ? `${hiddenCount} older job(s) not shown (GET /api/jobs lists them all).` : "";
  }

  function setCount(active) {
    count.textContent = String(active);
    count.dataset.busy = active > 0 ? "true" : "false";
    toggle.title = active ? `${active} job(s) queued or running` : "no job queued or running";
  }

  // A screen reader hears when a job it could have watched ends, whether or not the panel is open.
  function announceEnded(jobs) {
    const ended = [];
    for (const job of jobs) {
      const before = lastStates.get(job.id);
      if ((before === "queued" || before === "running") && !(job.state === "queued" || job.state === "running")) {
        ended.push(`${TITLES[job.kind] || job.kind} ${STATES[job.state] || job.state}`);
      }
    }
    lastStates.clear();
    for (const job of jobs) lastStates.set(job.id, job.state);
    if (ended.length) announce.textContent = ended.join("; ") + ".";
  }

  async function refresh() {
    let body;
    try {
      const response = await fetch("/api/jobs", { headers: { Accept: "application/json" } });
      body = await response.json();
      if (!response.ok) throw new Error(body && body.detail ? body.detail : response.statusText);
    } catch (err) {
      errorBox.textContent = "The list of jobs could not be read: " + err.message;
      errorBox.hidden = false;
      return false;
    }
    errorBox.hidden = true;
    setCount(body.active);
    announceEnded(body.jobs);
    busy = body.active > 0;
    if (!panel.hidden) render(body);
    panel.dataset.loaded = "true";
    return true;
  }

  function schedule() {
    clearTimeout(timer);
    if (document.hidden) return; // no polling from a tab nobody looks at
    timer = setTimeout(async () => { await refresh(); schedule(); }, busy || !panel.hidden ? BUSY_MS : IDLE_MS);
  }

  async function cancelJob(id, button) {
    button.disabled = true;
    try {
      const response = await fetch("/api/jobs/" + encodeURIComponent(id) + "/cancel", { method: "POST" });
      if (!response.ok) {
        const body = await response.json().catch(() => null);
        throw new Error(body && body.detail ? body.detail : response.statusText);
      }
    } catch (err) {
      errorBox.textContent = "The job could not be cancelled: " + err.message;
      errorBox.hidden = false;
    } finally {
      button.disabled = false;
    }
    await refresh();
    schedule();
  }

  function open() {
    panel.hidden = false;
    toggle.setAttribute("aria-expanded", "true");
    refresh().then(schedule);
    document.getElementById("jobs-panel-title").focus({ preventScroll: true });
  }

  function close() {
    panel.hidden = true;
    toggle.setAttribute("aria-expanded", "false");
    toggle.focus();
    schedule();
  }

  document.getElementById("jobs-panel-title").tabIndex = -1;
  toggle.addEventListener("click", () => (panel.hidden ? open() : close()));
  document.getElementById("jobs-close").addEventListener("click", close);
  panel.addEventListener("keydown", (event) => {
    if (event.key === "Escape") { event.preventDefault(); close(); }
  });
  document.addEventListener("visibilitychange", () => { if (!document.hidden) refresh().then(schedule); });
  // Pages that start a job say so, and the count follows at once rather than on the next idle poll.
  document.addEventListener("pellucid:job-started", () => refresh().then(schedule));
  refresh().then(schedule);
})();
