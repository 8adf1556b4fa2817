// Image evidence page: intake, top-k, feature maps, attribution maps as jobs.
"use strict";

(() => {
  const { api, el, $, clear, fmt, fmtInt, fmtSeconds, showError, fillSelect } = P;

  const state = {
    model: $("#model-select").value,
    summary: null,
    image: null,        // ImageInfo
    methods: [],
    activations: null,  // last ActivationsResponse
    channelValues: null,
    resultValues: null,
    result: null,
    job: null,
    results: [],        // ResultResponse list for the strip
  };

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

  async function openImage(getInfo) {
    showError(intakeError, "");
    try {
      state.image = await getInfo();
    } catch (err) {
      showError(intakeError, err.message);
      return;
    }
    P.remember("image", state.image.id);
    state.results = [];
    renderStrip();
    $("#result-view").hidden = true;
    await showImage();
  }

  async function showImage() {
    const img = state.image;
    $("#image-name").textContent = img.name;
    $("#image-id").textContent = "sha256 " + img.id.slice(0, 16) + "…";
    try {
      const [prepared, prediction] = await Promise.all([
        api(`/api/images/${img.id}/prepared?model=${encodeURIComponent(state.model)}`),
        api("/api/predict", { json: { model: state.model, image: img.id, k: 5 } }),
      ]);
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

  // ---- attribution maps --------------------------------------------------------------------

  async function loadMethods() {
    const list = await api("/api/methods");
    state.methods = list.methods;
    const select = $("#method-select");
    fillSelect(select, state.methods.map((m) => [m.name, m.title]), "occlusion");
    showMethod();
  }

  function currentMethod() {
    return state.methods.find((m) => m.name === $("#method-select").value);
  }

  function showMethod() {
    const m = currentMethod();
    if (!m) return;
    P.paramInputs($("#method-params"), m);
    $("#method-help").textContent = `${m.description} Source: ${m.reference}.`;
  }

  function setRunning(running) {
    for (const id of ["#run-button", "#faith-button", "#sanity-button"]) $(id).disabled = running;
    $("#cancel-button").disabled = !running;
  }

  async function runMethod(event) {
    event.preventDefault();
    if (!state.image) return;
    const m = currentMethod();
    showError($("#job-error"), "");
    const target = $("#target-select").value;
    let status;
    try {
      status = await api("/api/jobs", {
        json: { model: state.model, image: state.image.id, method: m.name, target: target === "" ? null : Number(target),
                params: P.readParams($("#method-params"), m) },
      });
    } catch (err) {
      showError($("#job-error"), err.message);
      return;
    }
    status = await track(status, m.name === "occlusion" ? "positions" : "steps");
    if (status && status.state === "done") {
      await showResult(status.result_id, true);
    }
  }

  // Follow a job in the progress box; returns its final status (or null when polling failed).
  async function track(status, unit) {
    state.job = status.id;
    setRunning(true);
    const bar = $("#job-bar");
    $("#job-box").hidden = false;
    $("#job-box").dataset.state = status.state;
    const cached = status.cached;
    try {
      status = await P.followJob(status.id, (s) => {
        s.cached = cached;
        bar.value = s.fraction;
        $("#job-text").textContent = P.progressText(s, unit);
        $("#job-box").dataset.state = s.state;
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
      await api(`/api/jobs/${state.job}/cancel`, { method: "POST" });
    } catch (err) {
      showError($("#job-error"), err.message);
    }
  }

  async function showResult(resultId, addToStrip) {
    const r = await api("/api/results/" + resultId);
    state.result = r;
    state.resultValues = r.values;
    $("#result-base").src = r.image_png;
    $("#result-map").src = r.map_png;
    $("#result-map").style.opacity = $("#result-opacity").value;
    $("#result-colorbar").src = r.colorbar;
    $("#result-png").href = `/api/results/${r.id}/overlay.png?opacity=${$("#result-opacity").value}`;
    $("#result-title").textContent = `${r.title} for “${r.target_label}”`;
    const facts = clear($("#result-facts"));
    const rows = [
      ["Value shown", r.value_label],
      ["Target class", `${r.target} · ${r.target_label} (${r.target_source === "given" ? "chosen" : "the model's top-1"})`],
      ["Colour scale", `${r.cmap}, ${fmt(r.vmin)} to ${fmt(r.vmax)}` + (r.signed ? " (diverging, centred at zero)" : "")],
      ["Parameters", Object.entries(r.params).map(([k, v]) => `${k}=${v}`).join(", ") || "none"],
      ["Cost", `${fmtInt(r.n_forwards)} forward, ${fmtInt(r.n_backwards)} backward passes in ${fmtSeconds(r.seconds)}`],
      ["Model fingerprint", r.fingerprint.slice(0, 16) + "…"],
      ["Image sha256", r.image.slice(0, 16) + "…"],
    ];
    if (r.engine) rows.splice(3, 0, ["Engine that ran", r.engine + (r.approximate ? " (approximate)" : " (exact)")]);
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
    renderChecks(r);
    const known = state.results.findIndex((x) => x.id === r.id);
    if (known >= 0) state.results[known] = r;
    else if (addToStrip) state.results.push(r);
    renderStrip();
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
                     text: sc.verdict === "pass" ? "Passes the check" : "Fails the check" }),
        ": " + sc.reason,
      ]));
      const steps = sc.steps;
      const xs = steps.map((_, i) => i + 1);
      const series = [{ label: "Spearman", xs, ys: steps.map((s) => s.spearman) }];
      if (steps.every((s) => s.ssim !== null)) series.push({ label: "SSIM", xs, ys: steps.map((s) => s.ssim), cls: "second" });
      const chart = P.lineChart(series, { xLabel: "layers randomised, from the top", yLabel: "similarity to the trained map",
                                          xMax: Math.max(1, steps.length), yMin: -1, yMax: 1 });
      chart.setAttribute("aria-label", "Similarity of the map to the trained model's map after each randomisation step");
      sanity.append(chart, el("p", { class: "note" }, [
        el("span", { class: "key-first", text: "Spearman rank correlation of |map|" }), " · ",
        el("span", { class: "key-second", text: "SSIM" }), ` · threshold ${sc.threshold}`,
      ]));
    }
  }

  async function renderRanking() {
    const current = state.result;
    const scored = state.results.filter((x) => x.faithfulness && current && x.target === current.target);
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
    if (!state.result) return;
    showError($("#job-error"), "");
    let status;
    try {
      status = await api(`/api/results/${state.result.id}/${kind}`, { method: "POST" });
    } catch (err) {
      showError($("#job-error"), err.message);
      return;
    }
    status = await track(status, kind === "sanity" ? "randomisation steps" : "steps");
    if (status && status.state === "done") await showResult(status.result_id, false);
  }

  function renderStrip() {
    const strip = clear($("#result-strip"));
    $("#strip-empty").hidden = state.results.length > 0;
    for (const r of state.results) {
      strip.append(el("button", { type: "button", class: "strip-item", onclick: () => showResult(r.id, false),
                                  title: `${r.title}, ${r.target_label}` }, [
        el("span", { class: "stack small" }, [
          el("img", { src: r.image_png, alt: "", class: "pixelated" }),
          el("img", { src: r.map_png, alt: `${r.title} map for ${r.target_label}`, class: "pixelated over", style: "opacity:0.6" }),
        ]),
        el("span", { text: r.title }),
        el("span", { class: "note", text: r.target_label + (r.engine ? " · " + r.engine : "") }),
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
      history.replaceState(null, "", "?model=" + encodeURIComponent(state.model));
      await loadModel();
      if (state.image) {
        state.results = [];
        renderStrip();
        $("#result-view").hidden = true;
        $("#channel-view").hidden = true;
        await showImage();
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
    $("#method-select").addEventListener("change", showMethod);
    $("#method-form").addEventListener("submit", runMethod);
    $("#cancel-button").addEventListener("click", cancelJob);
    $("#faith-button").addEventListener("click", () => check("faithfulness"));
    $("#sanity-button").addEventListener("click", () => check("sanity"));

    P.hoverReadout($("#channel-stack"), () => state.channelValues, (row, col, v) => {
      $("#channel-readout").textContent = v === null ? "Point at the map to read the activation there."
        : `row ${row}, column ${col}: activation ${fmt(v, 4)}`;
    });
    P.hoverReadout($("#result-stack"), () => state.resultValues, (row, col, v) => {
      if (v === null) { $("#result-readout").textContent = "Point at the map to read its value there."; return; }
      const what = state.result && state.result.method === "occlusion" ? "probability drop" : "attribution";
      $("#result-readout").textContent = `pixel (${col}, ${row}): ${what} ${fmt(v, 4)}`;
    });
  }

  async function start() {
    wire();
    try {
      await Promise.all([loadModel(), loadMethods()]);
      await browse("");
    } catch (err) {
      showError(intakeError, err.message);
    }
    document.body.dataset.ready = "true";
  }

  start();
})();
