// Shared helpers for Pellucid's pages: JSON API calls, small DOM builders, number formats.
"use strict";

const P = (() => {
  async function api(path, options = {}) {
    const opts = { ...options, headers: { ...(options.headers || {}) } };
    if (opts.json !== undefined) {
      opts.body = JSON.stringify(opts.json);
      opts.headers["Content-Type"] = "application/json";
      opts.method = opts.method || "POST";
      delete opts.json;
    }
    let response;
    try {
      response = await fetch(path, opts);
    } catch (err) {
      throw new Error("the server did not answer (" + err.message + "); is it still running?");
    }
    let body = null;
    const text = await response.text();
    try { body = text ? JSON.parse(text) : null; } catch (_) { body = null; }
    if (!response.ok) {
      const detail = body && body.detail ? body.detail : (text || response.statusText);
      const error = new Error(typeof detail === "string" ? detail : JSON.stringify(detail));
      error.status = response.status;
      throw error;
    }
    return body;
  }

  function el(tag, attrs = {}, children = []) {
    const node = document.createElement(tag);
    for (const [key, value] of Object.entries(attrs)) {
      if (value === undefined || value === null || value === false) continue;
      if (key === "text") node.textContent = value;
      else if (key === "class") node.className = value;
      else if (key.startsWith("on")) node.addEventListener(key.slice(2), value);
      else if (key === "dataset") Object.assign(node.dataset, value);
      // Through the CSSOM: the server's content security policy refuses style attributes in markup.
      else if (key === "style") node.style.cssText = value;
      else node.setAttribute(key, value === true ? "" : value);
    }
    for (const child of [].concat(children)) {
      if (child === null || child === undefined) continue;
      node.append(child instanceof Node ? child : document.createTextNode(String(child)));
    }
    return node;
  }

  function $(selector, root = document) { return root.querySelector(selector); }

  function clear(node) { while (node.firstChild) node.removeChild(node.firstChild); return node; }

  function fmtInt(n) { return n === null || n === undefined ? "—" : Number(n).toLocaleString("en-US"); }

  function fmt(x, digits = 3) {
    if (x === null || x === undefined || Number.isNaN(x)) return "—";
    const a = Math.abs(x);
    if (a !== 0 && (a < 1e-3 || a >= 1e5)) return x.toExponential(digits - 1);
    return x.toFixed(digits);
  }

  function fmtSeconds(s) {
    if (s === null || s === undefined) return "—";
    if (s < 1) return (s * 1000).toFixed(0) + " ms";
    if (s < 90) return s.toFixed(1) + " s";
    return Math.round(s / 60) + " min";
  }

  function showError(node, message) {
    node.textContent = message || "";
    node.hidden = !message;
  }

  function fillSelect(select, items, selected) {
    clear(select);
    for (const item of items) {
      const [value, label] = Array.isArray(item) ? item : [item, item];
      const option = el("option", { value, text: label });
      if (String(value) === String(selected)) option.selected = true;
      select.append(option);
    }
  }

  // Report the value under the pointer for a (rows × cols) array drawn over an element. The element is
  // also a keyboard stop: arrow keys move a cross-hair one cell (Shift: ten cells) and the read-out follows.
  function hoverReadout(target, getValues, onValue) {
    const mark = el("span", { class: "crosshair", "aria-hidden": "true" });
    mark.hidden = true;
    target.append(mark);
    const pos = { row: null, col: null };
    function place(values) {
      const rows = values.length, cols = values[0].length;
      mark.style.left = (100 * pos.col / cols) + "%";
      mark.style.top = (100 * pos.row / rows) + "%";
      mark.style.width = Math.max(100 / cols, 0.5) + "%";
      mark.style.height = Math.max(100 / rows, 0.5) + "%";
      mark.hidden = false;
      onValue(pos.row, pos.col, values[pos.row][pos.col]);
    }
    function at(event) {
      const values = getValues();
      if (!values || !values.length) return;
      const box = target.getBoundingClientRect();
      const fx = (event.clientX - box.left) / box.width;
      const fy = (event.clientY - box.top) / box.height;
      if (fx < 0 || fy < 0 || fx >= 1 || fy >= 1) return;
      const row = Math.min(values.length - 1, Math.floor(fy * values.length));
      const col = Math.min(values[0].length - 1, Math.floor(fx * values[0].length));
      mark.hidden = true;
      onValue(row, col, values[row][col]);
    }
    const steps = { ArrowUp: [-1, 0], ArrowDown: [1, 0], ArrowLeft: [0, -1], ArrowRight: [0, 1] };
    target.tabIndex = 0;
    target.addEventListener("keydown", (event) => {
      const values = getValues();
      const step = steps[event.key];
      if (!step || !values || !values.length) return;
      event.preventDefault();
      const rows = values.length, cols = values[0].length, k = event.shiftKey ? 10 : 1;
      if (pos.row === null || pos.row >= rows || pos.col >= cols) { pos.row = rows >> 1; pos.col = cols >> 1; }
      else {
        pos.row = Math.max(0, Math.min(rows - 1, pos.row + step[0] * k));
        pos.col = Math.max(0, Math.min(cols - 1, pos.col + step[1] * k));
      }
      place(values);
    });
    target.addEventListener("mousemove", at);
    target.addEventListener("mouseleave", () => { if (document.activeElement !== target) onValue(null, null, null); });
    // On blur the last value stays readable (changing the text now could move what is being clicked).
    target.addEventListener("blur", () => { mark.hidden = true; pos.row = pos.col = null; });
  }

  // Poll a job until it finishes; onProgress gets each status.
  async function followJob(jobId, onProgress, intervalMs = 150) {
    document.dispatchEvent(new CustomEvent("pellucid:job-started", { detail: { id: jobId } }));  // the jobs panel's count
    for (;;) {
      const status = await api("/api/jobs/" + encodeURIComponent(jobId));
      onProgress(status);
      if (["done", "failed", "cancelled"].includes(status.state)) return status;
      await new Promise((resolve) => setTimeout(resolve, intervalMs));
    }
  }

  // The job's own unit (status.unit: patch positions, masks, maps, …) wins over the caller's guess.
  function progressText(status, unit = "steps") {
    if (status.state === "queued") return "waiting for a free worker…";
    if (status.state === "running") {
      const parts = [];
      if (status.total) parts.push(`${fmtInt(status.done)} of ${fmtInt(status.total)} ${status.unit || unit}`);
      else parts.push("starting…");
      if (status.seconds_left !== null && status.seconds_left !== undefined) {
        parts.push("about " + fmtSeconds(status.seconds_left) + " left" +
                   (status.left_from === "estimate" ? " (from the estimate)" : ""));
      }
      return parts.join(" · ");
    }
    if (status.state === "done") return `finished in ${fmtSeconds(status.elapsed)}` + (status.cached ? " (from the result cache)" : "");
    if (status.state === "cancelled") return `cancelled after ${fmtSeconds(status.elapsed)}`;
    return "failed: " + (status.error || "unknown error");
  }

  // Form inputs for a method's parameter schema (from GET /api/methods).
  function paramInputs(container, method, overrides = {}) {
    clear(container);
    for (const p of method.params) {
      const id = "param-" + p.name;
      let input;
      const value = overrides[p.name] !== undefined ? overrides[p.name] : p.default;
      if (p.type === "choice") {
        input = el("select", { id, name: p.name });
        fillSelect(input, p.choices, value);
      } else if (p.type === "int" || p.type === "float") {
        input = el("input", {
          id, name: p.name, type: "number", step: p.type === "int" ? "1" : "any",
          min: p.min === null ? undefined : p.min, max: p.max === null ? undefined : p.max,
          value: value === null ? "" : value,
        });
      } else {
        input = el("input", { id, name: p.name, type: "text", value: value === null ? "" : value, placeholder: value === null ? "automatic" : "" });
        if (p.suggestions && p.suggestions.length) {
          const list = el("datalist", { id: id + "-choices" }, p.suggestions.map((s) => el("option", { value: s })));
          input.setAttribute("list", list.id);
          container.append(list);
        }
      }
      input.title = p.help + " (" + p.allowed + ")";
      container.append(el("label", { for: id }, [p.name.replace(/_/g, " "), input]));
    }
  }

  function readParams(container, method) {
    const out = {};
    for (const p of method.params) {
      const input = container.querySelector(`[name="${p.name}"]`);
      if (!input) continue;
      const raw = input.value.trim();
      if (raw === "") continue;
      out[p.name] = p.type === "int" ? Number.parseInt(raw, 10) : p.type === "float" ? Number.parseFloat(raw) : raw;
      if ((p.type === "int" || p.type === "float") && Number.isNaN(out[p.name])) out[p.name] = raw;
    }
    return out;
  }

  // A small line chart as inline SVG: series = [{label, xs, ys, cls}], axes from 0 to the given maxima.
  // xTicks: the x values to label (default: quarters of xMax), e.g. whole layers.
  function lineChart(series, { xLabel = "", yLabel = "", xMax = 1, yMin = 0, yMax = 1, width = 320, height = 180,
                               xTicks = null } = {}) {
    const ns = "http://www.w3.org/2000/svg";
    const make = (tag, attrs) => {
      const node = document.createElementNS(ns, tag);
      for (const [k, v] of Object.entries(attrs)) node.setAttribute(k, v);
      return node;
    };
    const m = { l: 40, r: 10, t: 10, b: 34 };
    const w = width - m.l - m.r, h = height - m.t - m.b;
    const sx = (x) => m.l + (w * x) / xMax;
    const sy = (y) => m.t + h - (h * (y - yMin)) / (yMax - yMin || 1);
    const svg = make("svg", { viewBox: `0 0 ${width} ${height}`, width, height, class: "chart", role: "img" });
    svg.append(make("rect", { x: m.l, y: m.t, width: w, height: h, class: "chart-frame" }));
    for (let i = 0; i <= 4; i++) {
      const yv = yMin + ((yMax - yMin) * i) / 4;
      const ty = make("text", { x: m.l - 4, y: sy(yv) + 3, class: "chart-tick", "text-anchor": "end" });
      ty.textContent = Number(yv.toFixed(2));
      svg.append(ty);
    }
    for (const xv of xTicks || [0, 1, 2, 3, 4].map((i) => (xMax * i) / 4)) {
      const tx = make("text", { x: sx(xv), y: m.t + h + 12, class: "chart-tick", "text-anchor": "middle" });
      tx.textContent = Number(xv.toFixed(2));
      svg.append(tx);
    }
    const xl = make("text", { x: m.l + w / 2, y: height - 4, class: "chart-label", "text-anchor": "middle" });
    xl.textContent = xLabel;
    const yl = make("text", { x: 10, y: m.t + h / 2, class: "chart-label", "text-anchor": "middle",
                              transform: `rotate(-90 10 ${m.t + h / 2})` });
    yl.textContent = yLabel;
    svg.append(xl, yl);
    const legend = [];
    for (const s of series) {
      const points = s.xs.map((x, i) => `${sx(x).toFixed(1)},${sy(s.ys[i]).toFixed(1)}`).join(" ");
      svg.append(make("polyline", { points, class: "chart-line " + (s.cls || "") }));
      legend.push(s.label);
    }
    const title = make("title", {});
    title.textContent = legend.join("; ");
    svg.prepend(title);
    return svg;
  }

  function remember(key, value) { try { localStorage.setItem("pellucid." + key, value); } catch (_) { /* private mode */ } }
  function recall(key) { try { return localStorage.getItem("pellucid." + key); } catch (_) { return null; } }

  // "Add a model" beside the model picker: a spec file from the server's --models folder, chosen by name.
  async function initAddModel() {
    const box = $("#add-model");
    const picker = $("#model-select");
    if (!box || !picker) return;
    let listing;
    try {
      listing = await api("/api/model-specs");
    } catch (_) {
      return; // an older server or a refused request: the picker works without it
    }
    if (!listing.available) return;
    $("#add-model-folder").textContent = listing.folder + "/";
    const select = $("#add-model-file");
    const button = $("#add-model-button");
    const error = $("#add-model-error");
    function fill(specs) {
      clear(select);
      for (const s of specs) {
        const label = s.error ? `${s.file} (cannot be used: ${s.error})`
          : `${s.file} · ${s.name}` + (s.served ? " (already on offer)" : "");
        select.append(el("option", { value: s.file, text: label, disabled: Boolean(s.error) }));
      }
      const usable = specs.find((s) => !s.error && !s.served) || specs.find((s) => !s.error);
      if (usable) select.value = usable.file;
      button.disabled = !usable;
      if (!specs.length) select.append(el("option", { value: "", text: "no .toml files in this folder", disabled: true }));
    }
    fill(listing.specs);
    box.addEventListener("toggle", () => {
      if (!box.open) return;
      const body = box.querySelector(".add-model-body");
      const room = document.documentElement.clientWidth - box.getBoundingClientRect().left;
      box.classList.toggle("align-end", body.offsetWidth > room - 8);
    });
    button.addEventListener("click", async () => {
      showError(error, "");
      button.disabled = true;
      try {
        const added = await api("/api/model-specs", { json: { file: select.value } });
        if (![...picker.options].some((o) => o.value === added.name)) {
          picker.append(el("option", { value: added.name, text: added.name }));
        }
        picker.value = added.name;
        picker.dispatchEvent(new Event("change", { bubbles: true }));
        $("#add-model-note").textContent = added.added ? `Added ${added.name}; it is selected in the model list.`
          : `${added.name} was already on offer; it is selected in the model list.`;
        fill((await api("/api/model-specs")).specs);
      } catch (err) {
        showError(error, err.message);
        button.disabled = false;
      }
    });
    box.hidden = false;
  }
  initAddModel();

  return { api, el, $, clear, fmt, fmtInt, fmtSeconds, showError, fillSelect, hoverReadout, followJob,
           progressText, paramInputs, readParams, remember, recall, lineChart };
})();
