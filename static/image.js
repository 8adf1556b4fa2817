// Image evidence page: intake, top-k, feature maps, attribution maps as jobs.
// The page's state (model, image, method, parameters, open map) lives in the URL, and images and maps
// live in the server's store, so a reload or a link sent to someone opens the same view.
"use strict";

(() => {
  const { api, el, $, clear, fmt, fmtInt, fmtSeconds, showError, fillSelect } = P;

  const state = {
    model: $("#model-select").value,
    summary: null,
    image: null,        // ImageInfo
    view: 0,            // bumped whenever the image or model changes: answers for an older view are dropped
    methods: [],
    activations: null,  // last ActivationsResponse
    channelValues: null,
    resultValues: null,
    result: null,
    job: null,          // {id, image, imageName, model} of the running job
    maps: [],           // MapSummary list of this image and model (from the store)
  };
  const COST_CONFIRM_SECONDS = 30;  // above this an estimate asks before the work starts

  const intakeError = $("#intake-error");

  // ---- model -------------------------------------------------------------------------------

  async function loadModel() {
    state.summary = await api("/api/models/" + encodeURIComponent(state.model));
    const labels = state.summary.labels.map((label, i) => [i, `${i} · ${label}`]);
    fillSelect($("#target-select"), [["", "top-1 class (automatic)"], ...labels], "");
    await loadSamples();
  }

  async function loadSamples() {
    const box = clear($("#samples"));
    const list = await api("/api/samples?model=" + encodeURIComponent(state.model));
    if (!list.samples.length) {
      box.append(el("span", { class: "note", text: "none for this model" }));
      return;
    }
    for (const s of list.samples) {
      box.append(el("button", {
        type: "button", class: "sample", title: s.name, dataset: { name: s.name },
        onclick: () => openImage(() => api("/api/samples/open", { json: { model: state.model, name: s.name } })),
      }, [el("img", { src: s.thumbnail, alt: "demo sample " + s.name, class: "pixelated" }), el("span", { text: s.name })]));
    }
  }

  // ---- recent images (kept in the store) --------------------------------------------------

  async function loadRecent() {
    const list = clear($("#recent"));
    let images;
    try {
      images = await api("/api/images?limit=24");
    } catch (err) {
      showError(intakeError, err.message);
      return;
    }
    $("#recent-empty").hidden = images.length > 0;
    for (const img of images) {
      const current = state.image && state.image.id === img.id;
      list.append(el("li", { dataset: { id: img.id } }, [
        el("button", {
          type: "button", class: "sample", title: `${img.name} · sha256 ${img.id.slice(0, 12)}…`,
          "aria-current": current ? "true" : null,
          onclick: () => openImage(() => api("/api/images/" + img.id)),
        }, [el("img", { src: img.thumbnail, alt: "", class: "pixelated" }), el("span", { text: img.name })]),
        el("button", { type: "button", class: "link forget", text: "forget",
                       "aria-label": `forget ${img.name} and its maps`, onclick: () => forgetImage(img) }),
      ]));
    }
  }

  async function forgetImage(img) {
    if (!window.confirm(`Forget ${img.name} and every map made from it? This removes them from the store.`)) return;
    try {
      await api("/api/images/" + img.id, { method: "DELETE" });
    } catch (err) {
      showError(intakeError, err.message);
      return;
    }
    if (state.image && state.image.id === img.id) {
      state.image = null;
      state.view += 1;
      forgetResult();
      for (const id of ["#seen", "#features", "#evidence"]) $(id).hidden = true;
      saveUrl(true);
    }
    await loadRecent();
  }

  // ---- image folder ------------------------------------------------------------------------

  async function browse(path) {
    const list = $("#folder-list");
    if (!list) return;
    try {
      const listing = await api("/api/folder?path=" + encodeURIComponent(path));
      $("#folder-path").textContent = listing.root_name + "/" + listing.path;
      clear(list);
      if (listing.parent !== null) {
        list.append(el("li", {}, [el("button", { type: "button", class: "link", text: "↑ up one folder", onclick: () => browse(listing.parent) })]));
      }
      for (const entry of listing.entries) {
        const action = entry.kind === "folder"
          ? () => browse(entry.path)
          : () => openImage(() => api("/api/folder/open", { json: { path: entry.path } }));
        list.append(el("li", { class: entry.kind }, [
          el("button", { type: "button", class: "link", text: (entry.kind === "folder" ? "▸ " : "") + entry.name, onclick: action }),
        ]));
      }
      if (!listing.entries.length) list.append(el("li", { class: "note", text: "no images here" }));
      if (listing.truncated) list.append(el("li", { class: "note", text: "(listing cut short)" }));
    } catch (err) {
      showError(intakeError, err.message);
    }
  }

  // ---- intake ------------------------------------------------------------------------------

  async function upload(file) {
    const form = new FormData();
    form.append("file", file, file.name);
    return api("/api/images", { method: "POST", body: form });
  }

  async function openImage(getInfo, { push = true } = {}) {
    showError(intakeError, "");
    let info;
    try {
      info = await getInfo();
    } catch (err) {
      showError(intakeError, err.message);
      return false;
    }
    state.image = info;
    state.view += 1;
    if (!state.job) clearJobLines();
    P.remember("image", info.id);
    forgetResult();
    noteDetachedJob();
    state.maps = [];
    renderStrip();
    saveUrl(push);
    await showImage();
    await Promise.all([loadMaps(), loadRecent()]);
    return true;
  }

  async function showImage() {
    const img = state.image;
    const view = state.view;
    $("#image-name").textContent = img.name;
    $("#image-id").textContent = "sha256 " + img.id.slice(0, 16) + "…";
    try {
      const [prepared, prediction] = await Promise.all([
        api(`/api/images/${img.id}/prepared?model=${encodeURIComponent(state.model)}`),
        api("/api/predict", { json: { model: state.model, image: img.id, k: 5 } }),
      ]);
      if (view !== state.view) return;
      $("#prepared").src = prepared.png;
      $("#prepared").style.width = Math.max(192, Math.min(320, prepared.size[1] * 2)) + "px";
      $("#image-size").textContent = `stored ${img.original_size[0]}×${img.original_size[1]} ${img.original_mode}` +
        ` → model input ${prepared.size[1]}×${prepared.size[0]}`;
      const notes = clear($("#image-notes"));
      for (const n of prepared.notes) notes.append(el("li", { text: n }));
      if (!prepared.notes.length) notes.append(el("li", { class: "quiet", text: "no conversion notes" }));
      renderTopk(prediction);
      $("#seen").hidden = false;
      $("#features").hidden = false;
      $("#evidence").hidden = false;
      await loadLayers();
    } catch (err) {
      showError(intakeError, err.message);
    }
  }

  function renderTopk(prediction) {
    const list = clear($("#topk"));
    for (const c of prediction.top) {
      const pct = (100 * c.probability);
      list.append(el("li", { class: "bar-row" }, [
        el("span", { class: "bar-label", text: c.label }),
        el("span", { class: "bar-track" }, [el("span", { class: "bar-fill", style: `width:${Math.max(0.5, pct).toFixed(1)}%` })]),
        el("span", { class: "bar-value", text: pct.toFixed(1) + "%" }),
      ]));
    }
    $("#topk-facts").textContent =
      `${prediction.output_kind} output · margin to runner-up ${fmt(prediction.margin)} · entropy ${fmt(prediction.entropy_bits, 2)} bits · ` +
      `forward ${fmtSeconds(prediction.seconds)} · model ${prediction.fingerprint.slice(0, 12)}…`;
  }

  // ---- feature maps ------------------------------------------------------------------------

  async function loadLayers() {
    const layers = await api("/api/models/" + encodeURIComponent(state.model) + "/layers");
    const select = $("#layer-select");
    const current = select.value;
    const rows = Object.fromEntries(layers.rows.map((r) => [r.name, r]));
    fillSelect(select, layers.feature_layers.map((name) => [name, `${name} (${rows[name].type}, ${rows[name].output_shape.slice(1).join("×")})`]),
      layers.feature_layers.includes(current) ? current : layers.default_feature_layer);
    await loadActivations();
  }

  async function loadActivations() {
    if (!state.image) return;
    const layer = $("#layer-select").value;
    if (!layer) return;
    try {
      const acts = await api("/api/activations", {
        json: { model: state.model, image: state.image.id, layer, sort: $("#sort-select").value },
      });
      state.activations = acts;
      const grid = $("#act-grid");
      grid.src = acts.png;
      grid.dataset.layer = acts.layer;
      grid.onload = () => { grid.style.width = Math.min(640, Math.max(grid.naturalWidth, 320)) + "px"; };
      $("#channel-input").max = acts.channels_total - 1;
      $("#features-facts").textContent =
        `${acts.layer}: ${acts.channels_total} channels of ${acts.output_shape.slice(1).join("×")}` +
        (acts.layout.channels.length < acts.channels_total ? ` (first ${acts.layout.channels.length} shown)` : "") +
        ` · forward ${fmtSeconds(acts.seconds)}, grid ${fmtSeconds(acts.render_seconds)}`;
    } catch (err) {
      $("#features-facts").textContent = err.message;
    }
  }

  function channelAt(event) {
    const acts = state.activations;
    if (!acts) return null;
    const grid = $("#act-grid");
    const box = grid.getBoundingClientRect();
    const scale = grid.naturalWidth / box.width;
    const x = (event.clientX - box.left) * scale;
    const y = (event.clientY - box.top) * scale;
    const { cell, gap, cols, channels } = acts.layout;
    const c = Math.floor((x - gap) / (cell + gap));
    const r = Math.floor((y - gap) / (cell + gap));
    if (c < 0 || c >= cols || r < 0) return null;
    const slot = r * cols + c;
    return slot < channels.length ? channels[slot] : null;
  }

  async function openChannel(channel) {
    if (!state.activations || channel === null) return;
    $("#channel-input").value = channel;
    try {
      const view = await api("/api/activations/channel", {
        json: { model: state.model, image: state.image.id, layer: state.activations.layer, channel },
      });
      state.channelValues = view.values;
      $("#channel-base").src = view.image_png;
      $("#channel-map").src = view.map_png;
      $("#channel-map").style.opacity = $("#channel-opacity").value;
      $("#channel-colorbar").src = view.colorbar;
      $("#channel-title").textContent = `${view.layer} · channel ${view.channel} (mean ${fmt(view.mean)}, peak ${fmt(view.max)})`;
      $("#channel-view").hidden = false;
    } catch (err) {
      $("#features-facts").textContent = err.message;
    }
  }

  // ---- the URL holds the page's state ------------------------------------------------------

  // Only parameters that differ from their defaults go in the URL, so links stay short.
  function changedParams() {
    const m = currentMethod();
    if (!m) return {};
    const read = P.readParams($("#method-params"), m);
    const out = {};
    for (const p of m.params) {
      if (read[p.name] !== undefined && String(read[p.name]) !== String(p.default)) out[p.name] = read[p.name];
    }
    return out;
  }

  function urlQuery() {
    const q = new URLSearchParams();
    q.set("model", state.model);
    if (state.image) q.set("image", state.image.id);
    const m = currentMethod();
    if (m) q.set("method", m.name);
    const target = $("#target-select").value;
    if (target !== "") q.set("target", target);
    for (const [k, v] of Object.entries(changedParams())) q.set("p." + k, v);
    if (state.result && state.image && state.result.image === state.image.id) q.set("map", state.result.id);
    return "?" + q.toString();
  }

  function saveUrl(push = false) {
    const query = urlQuery();
    if (query === location.search) return;
    if (push) history.pushState(null, "", query);
    else history.replaceState(null, "", query);
  }

  // Bring the page to what the URL says (first load, reload, back and forward, a link from someone).
  async function restoreFromUrl() {
    const q = new URLSearchParams(location.search);
    const model = q.get("model");
    let modelChanged = false;
    if (model && model !== state.model) {
      if (![...$("#model-select").options].some((o) => o.value === model)) {
        showError(intakeError, `This link names the model ${model}, which this server does not serve; showing ${state.model}.`);
      } else {
        $("#model-select").value = model;
        state.model = model;
        state.view += 1;
        modelChanged = true;
        await loadModel();
      }
    }
    const method = q.get("method");
    if (method && state.methods.some((m) => m.name === method)) $("#method-select").value = method;
    const overrides = {};
    for (const [k, v] of q) if (k.startsWith("p.")) overrides[k.slice(2)] = v;
    showMethod(overrides);
    if (q.has("target")) $("#target-select").value = q.get("target");
    const imageId = q.get("image");
    if (imageId && (modelChanged || !state.image || state.image.id !== imageId)) {
      const opened = await openImage(() => api("/api/images/" + encodeURIComponent(imageId)), { push: false });
      if (!opened) return;
    } else if (!imageId && state.image) {
      state.image = null;
      state.view += 1;
      forgetResult();
      for (const id of ["#seen", "#features", "#evidence"]) $(id).hidden = true;
    }
    const map = q.get("map");
    if (map && state.image) await showResult(map, { syncForm: !method });
    else if (!map) forgetResult();
  }

  // ---- attribution maps --------------------------------------------------------------------

  // A 'custom' baseline needs a reference picture that neither this page nor the JSON API can send,
  // so the page does not offer it (the Python API takes one: baseline_input=).
  function offeredMethod(m) {
    return { ...m, params: m.params.map((p) => (p.choices ? { ...p, choices: p.choices.filter((c) => c !== "custom") } : p)) };
  }

  async function loadMethods() {
    const list = await api("/api/methods");
    state.methods = list.methods.map(offeredMethod);
    const select = $("#method-select");
    fillSelect(select, state.methods.map((m) => [m.name, m.title]), "occlusion");
    showMethod();
  }

  function currentMethod() {
    return state.methods.find((m) => m.name === $("#method-select").value);
  }

  function showMethod(overrides = {}) {
    const m = currentMethod();
    if (!m) return;
    P.paramInputs($("#method-params"), m, overrides);
    $("#method-help").textContent = `${m.description} Source: ${m.reference}.`;
    scheduleEstimate();
  }

  // ---- cost before work --------------------------------------------------------------------

  let estimateTimer = null;
  function scheduleEstimate() {
    clearTimeout(estimateTimer);
    estimateTimer = setTimeout(showEstimate, 250);
  }

  function costText(est, what) {
    if (est.seconds === null || est.seconds === undefined) return `${what}: ${fmtInt(est.forwards)} forward-pass equivalents.`;
    const perForward = est.forwards ? est.seconds / est.forwards : null;
    const bound = est.method === "occlusion" ? "at most " : "about ";
    return `${what}: ${bound}${fmtSeconds(est.seconds)} on this server — ` +
      (est.positions ? `${fmtInt(est.positions)} patch positions, ` : "") +
      `${fmtInt(Math.round(est.forwards))} forward-pass equivalents (a backward pass counts as two)` +
      (perForward ? ` × ${perForward < 0.01 ? (perForward * 1000).toFixed(2) + " ms" : fmtSeconds(perForward)} ` +
                    "measured per forward pass" : "") + ".";
  }

  async function fetchEstimate() {
    const m = currentMethod();
    if (!m) return null;
    return api("/api/estimate", { json: { model: state.model, method: m.name, params: P.readParams($("#method-params"), m) } });
  }

  async function showEstimate() {
    const line = $("#method-cost");
    try {
      const est = await fetchEstimate();
      if (!est) return;
      line.textContent = est.allowed ? costText(est, "Cost of this map") : "This server would refuse this map: " + est.refusal;
      line.dataset.seconds = est.seconds === null ? "" : String(est.seconds);
    } catch (err) {
      line.textContent = err.message;
    }
  }

  // An in-page question (not a browser dialog) so it can be read and answered by keyboard.
  function confirmCost(text) {
    const box = $("#cost-confirm");
    $("#cost-confirm-text").textContent = text;
    box.hidden = false;
    $("#cost-go").focus();
    return new Promise((resolve) => {
      const answer = (yes) => () => { box.hidden = true; $("#cost-go").onclick = $("#cost-stop").onclick = null; resolve(yes); };
      $("#cost-go").onclick = answer(true);
      $("#cost-stop").onclick = answer(false);
    });
  }

  async function costAllows(est, what) {
    if (est.seconds === null || est.seconds === undefined || est.seconds <= COST_CONFIRM_SECONDS) return true;
    return confirmCost(costText(est, what) + ` That is more than ${COST_CONFIRM_SECONDS} s. Start it?`);
  }

  // ---- jobs --------------------------------------------------------------------------------

  function setRunning(running) {
    for (const id of ["#run-button", "#faith-button", "#sanity-button"]) $(id).disabled = running;
    $("#cancel-button").disabled = !running;
  }

  function clearJobLines() {
    showError($("#job-error"), "");
    $("#job-text").textContent = "";
    $("#job-bar").value = 0;
    $("#job-box").hidden = true;
    $("#cost-confirm").hidden = true;
  }

  function jobIsForView(job) {
    return job && state.image && job.image === state.image.id && job.model === state.model;
  }

  // The running job belongs to another image or model than the one shown now: say so beside its progress.
  function noteDetachedJob() {
    if (state.job && !jobIsForView(state.job)) {
      $("#job-box").dataset.detached = "true";
    }
  }

  async function runMethod(event) {
    event.preventDefault();
    if (!state.image || state.job) return;
    const m = currentMethod();
    clearJobLines();
    const params = P.readParams($("#method-params"), m);
    const target = $("#target-select").value;
    const job = { image: state.image.id, imageName: state.image.name, model: state.model };
    let status;
    try {
      const est = await fetchEstimate();
      if (!est.allowed) { showError($("#job-error"), est.refusal); return; }
      if (!(await costAllows(est, `${m.title} on ${job.imageName}`))) return;
      status = await api("/api/jobs", {
        json: { model: job.model, image: job.image, method: m.name, target: target === "" ? null : Number(target), params },
      });
    } catch (err) {
      showError($("#job-error"), err.message);
      return;
    }
    status = await track(status, job);
    if (status && status.state === "done") await finished(job, status);
  }

  // A finished job's map is shown only if the page still shows its image and model; else it is
  // kept in the store under its own image, and a line says where it went.
  async function finished(job, status) {
    if (jobIsForView(job)) {
      await showResult(status.result_id);
      await loadMaps();
    } else {
      $("#job-text").textContent = `The map for ${job.imageName} (${job.model}) is finished and kept with that image; ` +
        "it is not shown here because this page now shows another image or model.";
      const link = $("#job-text").appendChild(el("a", { href: status.link || "#", text: " Open it." }));
      link.id = "job-elsewhere";
    }
  }

  // Follow a job in the progress box; returns its final status (or null when polling failed).
  async function track(status, job) {
    state.job = { ...job, id: status.id };
    setRunning(true);
    const bar = $("#job-bar");
    const box = $("#job-box");
    box.hidden = false;
    box.dataset.state = status.state;
    box.dataset.detached = "false";
    const cached = status.cached;
    try {
      status = await P.followJob(status.id, (s) => {
        s.cached = cached;
        bar.value = s.fraction;
        const elsewhere = !jobIsForView(state.job) ? ` — for ${job.imageName} (${job.model}), not the image shown` : "";
        $("#job-text").textContent = P.progressText(s) + elsewhere;
        box.dataset.state = s.state;
      });
    } catch (err) {
      showError($("#job-error"), err.message);
      status = null;
    } finally {
      setRunning(false);
      state.job = null;
    }
    if (status && status.state === "failed") showError($("#job-error"), status.error);
    return status;
  }

  async function cancelJob() {
    if (!state.job) return;
    try {
      await api(`/api/jobs/${state.job.id}/cancel`, { method: "POST" });
    } catch (err) {
      showError($("#job-error"), err.message);
    }
  }

  // ---- one map -----------------------------------------------------------------------------

  function forgetResult() {
    state.result = null;
    state.resultValues = null;
    $("#result-view").hidden = true;
    clear($("#faith-out"));
    clear($("#sanity-out"));
  }

  // The method form shows what produced the map on screen (so the strip and the form never disagree).
  function syncFormTo(r) {
    if (!state.methods.some((m) => m.name === r.method)) return;
    $("#method-select").value = r.method;
    const m = currentMethod();
    const overrides = {};
    for (const p of m.params) if (r.params[p.name] !== undefined && r.params[p.name] !== null) overrides[p.name] = r.params[p.name];
    showMethod(overrides);
    $("#target-select").value = r.target_source === "given" ? String(r.target) : "";
  }

  async function showResult(resultId, { syncForm = true } = {}) {
    const view = state.view;
    let r;
    try {
      r = await api("/api/results/" + encodeURIComponent(resultId));
    } catch (err) {
      showError($("#job-error"), err.message);
      return;
    }
    if (view !== state.view) return;  // the user moved on meanwhile
    if (!state.image || r.image !== state.image.id || r.model !== state.model) {
      showError($("#job-error"), `Map ${r.id} was made for ${r.image_name} with ${r.model}, not for what this page shows.`);
      return;
    }
    state.result = r;
    state.resultValues = r.values;
    if (syncForm) syncFormTo(r);
    $("#result-base").src = r.image_png;
    $("#result-map").src = r.map_png;
    $("#result-map").style.opacity = $("#result-opacity").value;
    $("#result-colorbar").src = r.colorbar;
    $("#result-colorbar").alt = `Colour bar: ${r.unit}, from ${fmt(r.vmin)} to ${fmt(r.vmax)}`;
    $("#result-png").href = `/api/results/${r.id}/overlay.png?opacity=${$("#result-opacity").value}`;
    $("#result-title").textContent = `${r.title} for “${r.target_label}”`;
    const link = new URL(r.link, location.href).href;
    $("#result-link").href = r.link;
    $("#result-link").textContent = link;
    const facts = clear($("#result-facts"));
    const rows = [
      ["Value shown", r.value_label],
      ["Unit of the colour bar", r.unit],
      ["Target class", `${r.target} · ${r.target_label} (${r.target_source === "given" ? "chosen" : "the model's top-1"})`],
      ["Colour scale", `${r.cmap}, ${fmt(r.vmin)} to ${fmt(r.vmax)}` + (r.signed ? " (diverging, centred at zero)" : "")],
      ["Parameters", Object.entries(r.params).map(([k, v]) => `${k}=${v}`).join(", ") || "none"],
      ["Cost", `${fmtInt(r.n_forwards)} forward, ${fmtInt(r.n_backwards)} backward passes in ${fmtSeconds(r.seconds)}`],
      ["Model fingerprint", r.fingerprint.slice(0, 16) + "…"],
      ["Image sha256", r.image.slice(0, 16) + "…"],
    ];
    if (r.engine) rows.splice(4, 0, ["Engine that ran", r.engine + (r.approximate ? " (approximate)" : " (exact)")]);
    for (const [k, v] of Object.entries(r.extras)) {
      if (k === "engine" || k === "warning" || typeof v === "object") continue;
      rows.push([k.replace(/_/g, " "), Number.isInteger(v) ? fmtInt(v) : typeof v === "number" ? fmt(v, 4) : String(v)]);
    }
    for (const [k, v] of rows) {
      const dd = el("dd", { text: v });
      if (k === "Engine that ran") dd.id = "result-engine";
      facts.append(el("dt", { text: k }), dd);
    }
    const warning = $("#result-warning");
    warning.textContent = r.warning || "";
    warning.hidden = !r.warning;
    $("#result-view").hidden = false;
    $("#result-readout").textContent = "Point at the map, or focus it and use the arrow keys, to read its value there.";
    renderChecks(r);
    renderStrip();
    saveUrl();
    await renderRanking();
  }

  function renderChecks(r) {
    const faith = clear($("#faith-out"));
    if (r.faithfulness) {
      const f = r.faithfulness;
      const del = f.curves.deletion, ins = f.curves.insertion;
      faith.append(el("p", {}, [
        el("span", { class: "key-first", text: `deletion area ${fmt(f.deletion_auc, 3)}` }), " · ",
        el("span", { class: "key-second", text: `insertion area ${fmt(f.insertion_auc, 3)}` }),
        ` (${fmtInt(f.n_forwards)} forward passes)`,
      ]));
      const yMax = Math.max(1e-6, ...del.scores, ...ins.scores);
      const chart = P.lineChart([
        { label: "deletion", xs: del.fractions, ys: del.scores },
        { label: "insertion", xs: ins.fractions, ys: ins.scores, cls: "second" },
      ], { xLabel: "fraction of pixels removed / restored", yLabel: "probability", yMax });
      chart.setAttribute("aria-label", `Deletion and insertion curves: areas ${fmt(f.deletion_auc, 3)} and ${fmt(f.insertion_auc, 3)}`);
      chart.id = "faith-chart";
      faith.append(chart);
    }
    const sanity = clear($("#sanity-out"));
    if (r.sanity) {
      const sc = r.sanity;
      sanity.append(el("p", { id: "sanity-verdict" }, [
        el("span", { class: sc.verdict === "pass" ? "verdict-pass" : "verdict-fail",
                     text: sc.verdict === "pass" ? "Passes the check" : sc.verdict === "fail" ? "Fails the check" : "Inconclusive" }),
        ": " + sc.reason,
      ]));
      const steps = sc.steps;
      const xs = steps.map((_, i) => i + 1);
      const series = [{ label: "Spearman", xs, ys: steps.map((s) => s.spearman) }];
      if (steps.every((s) => s.ssim !== null)) series.push({ label: "SSIM", xs, ys: steps.map((s) => s.ssim), cls: "second" });
      // Whole steps only: at most about eight labels, each a step number.
      const every = Math.max(1, Math.ceil(steps.length / 8));
      const xTicks = [0, ...xs.filter((x) => x % every === 0 || x === steps.length)];
      const chart = P.lineChart(series, { xLabel: "randomisation steps (blocks of layers, from the top)",
                                          yLabel: "similarity to the trained map", xMax: Math.max(1, steps.length),
                                          yMin: -1, yMax: 1, xTicks });
      chart.id = "sanity-chart";
      chart.setAttribute("aria-label", "Similarity of the map to the trained model's map after each randomisation step");
      sanity.append(chart, el("p", { class: "note" }, [
        el("span", { class: "key-first", text: "Spearman rank correlation of |map|" }), " · ",
        el("span", { class: "key-second", text: "SSIM" }), ` · threshold ${sc.threshold}`,
      ]));
    }
  }

  async function renderRanking() {
    const current = state.result;
    const scored = state.maps.filter((x) => x.checks.includes("faithfulness") && current && x.target === current.target);
    const box = $("#ranking-box");
    box.hidden = scored.length < 2;
    if (scored.length < 2) return;
    const ranking = await api("/api/ranking?" + scored.map((x) => "results=" + x.id).join("&"));
    const body = clear($("#ranking tbody"));
    for (const row of ranking.rows) {
      body.append(el("tr", {}, [
        el("td", { class: "num", text: row.combined_rank }), el("td", { text: row.title }),
        el("td", { class: "num", text: fmt(row.deletion_auc, 3) }), el("td", { class: "num", text: fmt(row.insertion_auc, 3) }),
      ]));
    }
  }

  async function check(kind) {
    if (!state.result || state.job) return;
    const r = state.result;
    clearJobLines();
    const job = { image: r.image, imageName: r.image_name, model: r.model };
    const what = kind === "sanity" ? "The weight-randomisation check" : "The faithfulness score";
    let status;
    try {
      const est = await api(`/api/results/${r.id}/estimate?check=${kind}`);
      if (!est.done) {
        $("#method-cost").textContent = `${what}: about ${fmtInt(est.count)} ${est.units}, ` +
          (est.seconds === null ? `${fmtInt(Math.round(est.forwards))} forward-pass equivalents.` : `about ${fmtSeconds(est.seconds)} on this server.`);
        if (est.seconds !== null && est.seconds > COST_CONFIRM_SECONDS &&
            !(await confirmCost(`${what} of this map: about ${fmtInt(est.count)} ${est.units}, about ${fmtSeconds(est.seconds)} ` +
                                `on this server (${fmtInt(Math.round(est.forwards))} forward-pass equivalents). ` +
                                `That is more than ${COST_CONFIRM_SECONDS} s. Start it?`))) return;
      }
      status = await api(`/api/results/${r.id}/${kind}`, { method: "POST" });
    } catch (err) {
      showError($("#job-error"), err.message);
      return;
    }
    status = await track(status, job);
    if (status && status.state === "done" && jobIsForView(job) && state.result && state.result.id === r.id) {
      await showResult(r.id, { syncForm: false });
      await loadMaps();
    }
  }

  // ---- the maps of this image (from the store) ---------------------------------------------

  async function loadMaps() {
    if (!state.image) return;
    const view = state.view;
    let list;
    try {
      list = await api(`/api/images/${state.image.id}/maps?model=${encodeURIComponent(state.model)}`);
    } catch (err) {
      showError($("#job-error"), err.message);
      return;
    }
    if (view !== state.view) return;
    state.maps = list.maps;
    renderStrip();
    await renderRanking();
  }

  function renderStrip() {
    const strip = clear($("#result-strip"));
    $("#strip-empty").hidden = state.maps.length > 0;
    for (const m of state.maps) {
      const current = state.result && state.result.id === m.id;
      strip.append(el("div", { class: "strip-cell" }, [
        el("button", { type: "button", class: "strip-item", onclick: () => showResult(m.id),
                       "aria-current": current ? "true" : "false", dataset: { id: m.id },
                       title: `${m.title}, ${m.target_label}` }, [
          el("img", { src: m.thumbnail, alt: `${m.title} map for ${m.target_label}`, class: "thumb" }),
          el("span", { text: m.title }),
          el("span", { class: "note", text: m.target_label + (m.engine ? " · " + m.engine : "") +
                                            (m.checks.length ? " · " + m.checks.join(", ") : "") }),
        ]),
        el("a", { href: m.link, class: "note", text: "link", "aria-label": `link to the ${m.title} map for ${m.target_label}` }),
      ]));
    }
  }

  // ---- wiring ------------------------------------------------------------------------------

  function wire() {
    const input = $("#file-input");
    input.addEventListener("change", () => {
      if (input.files.length) openImage(() => upload(input.files[0]));
    });
    const zone = $("#dropzone");
    zone.addEventListener("keydown", (e) => { if (e.key === "Enter" || e.key === " ") { e.preventDefault(); input.click(); } });
    zone.addEventListener("dragover", (e) => { e.preventDefault(); zone.classList.add("hot"); });
    zone.addEventListener("dragleave", () => zone.classList.remove("hot"));
    zone.addEventListener("drop", (e) => {
      e.preventDefault();
      zone.classList.remove("hot");
      if (e.dataTransfer.files.length) openImage(() => upload(e.dataTransfer.files[0]));
    });

    $("#model-select").addEventListener("change", async () => {
      state.model = $("#model-select").value;
      state.view += 1;
      if (!state.job) clearJobLines();
      forgetResult();
      noteDetachedJob();
      state.maps = [];
      renderStrip();
      await loadModel();
      showMethod();
      saveUrl(true);
      if (state.image) {
        $("#channel-view").hidden = true;
        await showImage();
        await loadMaps();
      }
    });
    $("#layer-select").addEventListener("change", () => { $("#channel-view").hidden = true; loadActivations(); });
    $("#sort-select").addEventListener("change", loadActivations);
    $("#act-grid").addEventListener("click", (e) => openChannel(channelAt(e)));
    $("#channel-open").addEventListener("click", () => openChannel(Number.parseInt($("#channel-input").value, 10) || 0));
    $("#channel-opacity").addEventListener("input", (e) => { $("#channel-map").style.opacity = e.target.value; });
    $("#result-opacity").addEventListener("input", (e) => {
      $("#result-map").style.opacity = e.target.value;
      if (state.result) $("#result-png").href = `/api/results/${state.result.id}/overlay.png?opacity=${e.target.value}`;
    });
    $("#method-select").addEventListener("change", () => { showMethod(); saveUrl(); });
    $("#method-params").addEventListener("change", () => { scheduleEstimate(); saveUrl(); });
    $("#target-select").addEventListener("change", () => saveUrl());
    $("#method-form").addEventListener("submit", runMethod);
    $("#cancel-button").addEventListener("click", cancelJob);
    $("#faith-button").addEventListener("click", () => check("faithfulness"));
    $("#sanity-button").addEventListener("click", () => check("sanity"));
    $("#copy-link").addEventListener("click", async () => {
      try {
        await navigator.clipboard.writeText($("#result-link").textContent);
        $("#copy-link").textContent = "Copied";
      } catch (_) {
        $("#copy-link").textContent = "Select the link and copy it";
      }
      setTimeout(() => { $("#copy-link").textContent = "Copy link"; }, 2500);
    });
    window.addEventListener("popstate", () => restoreFromUrl().catch((err) => showError(intakeError, err.message)));

    P.hoverReadout($("#channel-stack"), () => state.channelValues, (row, col, v) => {
      $("#channel-readout").textContent = v === null ? "Point at the map, or focus it and use the arrow keys, to read the activation there."
        : `row ${row}, column ${col}: activation ${fmt(v, 4)}`;
    });
    P.hoverReadout($("#result-stack"), () => state.resultValues, (row, col, v) => {
      if (v === null) { $("#result-readout").textContent = "Point at the map, or focus it and use the arrow keys, to read its value there."; return; }
      const unit = state.result ? state.result.unit : "";
      $("#result-readout").textContent = `pixel (${col}, ${row}): ${fmt(v, 4)} ${unit ? "· " + unit : ""}`;
    });
  }

  async function start() {
    wire();
    try {
      await Promise.all([loadModel(), loadMethods(), loadRecent()]);
      await browse("");
      await restoreFromUrl();
    } catch (err) {
      showError(intakeError, err.message);
    }
    document.body.dataset.ready = "true";
  }

  start();
})();
