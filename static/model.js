// Model anatomy page: spec, fingerprint, kernels with flags, layer map.
"use strict";

(() => {
  const { api, el, $, clear, fmt, fmtInt, showError, fillSelect } = P;
  let model = $("#model-select").value;
  let layers = null;

  async function loadSummary() {
    const s = await api("/api/models/" + encodeURIComponent(model));
    $("#model-name").textContent = s.name;
    $("#model-desc").textContent = s.description;
    const facts = clear($("#model-facts"));
    const rows = [
      ["Fingerprint (sha256 of the weights)", s.fingerprint, "model-fingerprint"],
      ["Input", `${s.input_shape[0]} channel(s), ${s.input_shape[1]}×${s.input_shape[2]} px`],
      ["Output", `${s.num_classes} classes, ${s.output_kind}`],
      ["Classes", s.labels.length > 12 ? s.labels.slice(0, 12).join(", ") + ", …" : s.labels.join(", ")],
      ["Weights file", s.weights_path || "none (fingerprint of the parameters)"],
      ["Forward hooks", s.supports_hooks ? "supported (layer views available)" : "not supported by this model format"],
      ["Loaded in", fmt(s.load_seconds, 2) + " s"],
    ];
    for (const [k, v, id] of rows) facts.append(el("dt", { text: k }), el("dd", { text: v, id, class: id ? "mono" : undefined }));
    const notes = clear($("#model-notes"));
    for (const n of s.notes) notes.append(el("li", { text: n }));
    $("#model-spec").textContent = JSON.stringify(s.spec, null, 2);
    $("#card-box").hidden = !s.card;
    $("#model-card").textContent = s.card || "";
    fillSelect($("#kernel-layer"), s.conv_layers, s.conv_layers[0]);
  }

  function mark(frame, img, k, index, kind) {
    const natW = img.naturalWidth, natH = img.naturalHeight;
    const [cellH, cellW] = k.cell;
    let r, c, w, h;
    if (k.view === "rgb") {
      r = Math.floor(index / k.cols); c = index % k.cols; w = cellW; h = cellH;
    } else {
      r = k.filters.indexOf(index);
      if (r < 0) return;
      c = 0; w = k.cols * (cellW + k.gap) - k.gap; h = cellH;
    }
    const left = k.gap + c * (cellW + k.gap), top = k.gap + r * (cellH + k.gap);
    frame.append(el("span", {
      class: "kernel-mark " + kind, "aria-hidden": "true",
      style: `left:${(100 * (left - 1)) / natW}%;top:${(100 * (top - 1)) / natH}%;` +
             `width:${(100 * (w + 2)) / natW}%;height:${(100 * (h + 2)) / natH}%`,
    }));
  }

  async function loadKernels() {
    const layer = $("#kernel-layer").value;
    const filter = $("#kernel-filter").value.trim();
    let url = `/api/models/${encodeURIComponent(model)}/kernels?layer=${encodeURIComponent(layer)}`;
    if (filter !== "") url += "&filter=" + encodeURIComponent(filter);
    let k;
    try {
      k = await api(url);
    } catch (err) {
      $("#kernel-flags").textContent = err.message;
      return;
    }
    const frame = $("#kernel-frame");
    frame.querySelectorAll(".kernel-mark").forEach((n) => n.remove());
    const img = $("#kernel-grid");
    img.alt = `Kernels of ${k.layer} (${k.layer_type}, weights ${k.weight_shape.join("×")})` +
      (k.dead.length ? `; dead filters: ${k.dead.join(", ")}` : "") +
      (k.near_duplicates.length ? `; near-duplicate pairs: ${k.near_duplicates.map((p) => p.a + "/" + p.b).join(", ")}` : "");
    await new Promise((resolve) => { img.onload = resolve; img.onerror = resolve; img.src = k.png; });
    const scale = Math.max(1, Math.min(4, Math.floor(420 / img.naturalWidth)));
    img.style.width = img.naturalWidth * scale + "px";
    img.dataset.layer = k.layer;
    const dupes = new Set();
    for (const p of k.near_duplicates) { dupes.add(p.a); dupes.add(p.b); }
    for (const f of k.dead) mark(frame, img, k, f, "dead");
    for (const f of dupes) if (!k.dead.includes(f)) mark(frame, img, k, f, "dup");
    const bar = $("#kernel-colorbar");
    bar.hidden = !k.colorbar;
    if (k.colorbar) bar.src = k.colorbar;
    $("#kernel-explain").textContent = `${k.layer} · ${k.layer_type} · weights ${k.weight_shape.join("×")}` +
      (k.groups > 1 ? ` in ${k.groups} groups` : "") + ". " + k.explanation +
      (k.view === "channels" && k.filters.length < k.weight_shape[0] ? ` Showing filters ${k.filters[0]}–${k.filters[k.filters.length - 1]} of ${k.weight_shape[0]}; pick a filter to see it alone.` : "");
    const flags = clear($("#kernel-flags"));
    flags.append(
      el("span", { class: "legend-dead", text: `Dead filters (solid outline): ${k.dead.length ? k.dead.join(", ") : "none"}` }),
      " — " + k.dead_rule + ". ",
      el("br"),
      el("span", { class: "legend-dup", text: `Near-duplicate pairs (dashed outline): ${k.duplicates_total ? k.near_duplicates.map((p) => `${p.a} & ${p.b} (cos ${fmt(p.cosine, 3)})`).join("; ") : "none"}` }),
      " — " + k.duplicate_rule + ".",
    );
    const body = clear($("#norm-table tbody"));
    k.norms.forEach((n, i) => {
      const flag = k.dead.includes(i) ? "dead" : dupes.has(i) ? "near duplicate" : "";
      body.append(el("tr", {}, [
        el("td", { class: "num", text: i }), el("td", { class: "num", text: fmt(n, 4) }),
        el("td", { text: k.median_norm ? fmt(n / k.median_norm, 2) + "×" : "—" }), el("td", { text: flag }),
      ]));
    });
  }

  function rf(r) {
    if (r.rf_global) return "whole input";
    if (!r.rf_size) return "—";
    const same = (a) => (a[0] === a[1] ? String(a[0]) : a.join("×"));
    return `${same(r.rf_size)} · ${same(r.rf_jump)} · ${same(r.rf_start)}` + (r.rf_multipath ? " (several paths)" : "");
  }

  function renderLayers() {
    if (!layers) return;
    const all = $("#show-containers").checked;
    const body = clear($("#layer-table tbody"));
    for (const r of layers.rows) {
      if (!all && r.kind !== "leaf") continue;
      body.append(el("tr", { class: r.kind === "leaf" ? "" : "container", title: r.notes.join("; ") || undefined }, [
        el("td", { class: "mono", text: r.name }), el("td", { text: r.type }),
        el("td", { class: "mono", text: r.output_shape ? r.output_shape.join("×") : "—" }),
        el("td", { class: "num", text: fmtInt(r.params) }), el("td", { class: "num", text: fmtInt(r.macs) }),
        el("td", { class: "mono", text: rf(r) }),
      ]));
    }
    const foot = clear($("#layer-table tfoot"));
    foot.append(el("tr", {}, [
      el("td", { text: "Total" }), el("td", { text: `${layers.rows.filter((r) => r.kind === "leaf").length} leaf modules` }),
      el("td", { class: "mono", text: "input " + layers.input_shape.join("×") }),
      el("td", { class: "num", text: fmtInt(layers.total_params) }), el("td", { class: "num", text: fmtInt(layers.total_macs) }),
      el("td", { text: `dry run ${fmt(layers.seconds, 2)} s` }),
    ]));
    const notes = clear($("#layer-notes"));
    for (const n of layers.notes) notes.append(el("li", { text: n }));
  }

  async function loadLayers() {
    layers = await api(`/api/models/${encodeURIComponent(model)}/layers`);
    renderLayers();
  }

  async function loadAll() {
    showError($("#model-error"), "");
    try {
      await loadSummary();
      await Promise.all([loadKernels(), loadLayers()]);
    } catch (err) {
      showError($("#model-error"), err.message);
    }
  }

  $("#model-select").addEventListener("change", () => {
    model = $("#model-select").value;
    history.replaceState(null, "", "?model=" + encodeURIComponent(model));
    $("#kernel-filter").value = "";
    loadAll();
  });
  $("#kernel-layer").addEventListener("change", () => { $("#kernel-filter").value = ""; loadKernels(); });
  $("#kernel-show").addEventListener("click", loadKernels);
  $("#show-containers").addEventListener("change", renderLayers);
  loadAll().then(() => { document.body.dataset.ready = "true"; });
})();
