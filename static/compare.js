// Side by side: one method on two (model, image) pairs, on one shared colour scale.
// Each side's job is bound to the model and image it was started for: if the side's choice changes
// while it runs, its map is kept in the store under its own image and not drawn under the new choice.
"use strict";

(() => {
  const { api, el, $, fmt, fmtSeconds, showError, fillSelect } = P;
  const sides = ["a", "b"];
  const sideName = { a: "left", b: "right" };
  const values = { a: null, b: null };
  const results = { a: null, b: null };
  const running = { a: null, b: null };  // job id of each side while it runs
  let methods = [];
  let cancelled = false;

  // The 'custom' baseline needs a reference picture this page cannot send (see the image page).
  function offeredMethod(m) {
    return { ...m, params: m.params.map((p) => (p.choices ? { ...p, choices: p.choices.filter((c) => c !== "custom") } : p)) };
  }

  async function imageChoices(side) {
    const model = $("#model-" + side).value;
    const [recent, samples] = await Promise.all([api("/api/images"), api("/api/samples?model=" + encodeURIComponent(model))]);
    const select = $("#image-" + side);
    const keep = select.value || P.recall("image");
    const items = recent.map((img) => ["id:" + img.id, img.name + " · " + img.id.slice(0, 8)]);
    for (const s of samples.samples) items.push(["sample:" + s.name, "demo sample " + s.name]);
    if (!items.length) items.push(["", "upload an image first"]);
    fillSelect(select, items, keep && keep.includes(":") ? keep : "id:" + keep);
    if (side === "b" && !select.dataset.touched && items.length > 1 && $("#model-a").value === $("#model-b").value) {
      select.selectedIndex = Math.min(1, items.length - 1);
    }
  }

  async function targets(side) {
    const summary = await api("/api/models/" + encodeURIComponent($("#model-" + side).value));
    fillSelect($("#target-" + side), [["", "top-1 class"], ...summary.labels.map((l, i) => [i, `${i} · ${l}`])], "");
  }

  function choice(side) {
    return { model: $("#model-" + side).value, image: $("#image-" + side).value, target: $("#target-" + side).value };
  }

  async function imageId(side, picked) {
    if (picked.image.startsWith("id:")) return picked.image.slice(3);
    if (picked.image.startsWith("sample:")) {
      const info = await api("/api/samples/open", { json: { model: picked.model, name: picked.image.slice(7) } });
      return info.id;
    }
    throw new Error("choose an image for the " + sideName[side] + " side first");
  }

  function sameChoice(a, b) { return a.model === b.model && a.image === b.image && a.target === b.target; }

  function clearSide(side) {
    results[side] = null;
    values[side] = null;
    $("#stack-" + side).hidden = true;
    $("#colorbar-" + side).hidden = true;
    $("#facts-" + side).textContent = "";
    $("#readout-" + side).textContent = "";
    showError($("#warning-" + side), "");
  }

  // Runs one side's job; returns its result id, or null when the side's choice changed meanwhile.
  async function runSide(side, method, params, picked) {
    const box = $("#job-" + side);
    const bar = box.querySelector("progress");
    const text = box.querySelector("span");
    box.hidden = false;
    bar.value = 0;
    text.textContent = "";
    let status = await api("/api/jobs", {
      json: { model: picked.model, image: await imageId(side, picked), method: method.name,
              target: picked.target === "" ? null : Number(picked.target), params },
    });
    running[side] = status.id;
    if (cancelled) await api(`/api/jobs/${status.id}/cancel`, { method: "POST" });
    const cached = status.cached;
    try {
      status = await P.followJob(status.id, (s) => {
        s.cached = cached;
        bar.value = s.fraction;
        text.textContent = P.progressText(s);
        box.dataset.state = s.state;
      });
    } finally {
      running[side] = null;
    }
    if (status.state === "cancelled") throw new Error("cancelled; nothing was drawn");
    if (status.state !== "done") throw new Error(`the ${sideName[side]} side failed: ${status.error || status.state}`);
    if (!sameChoice(picked, choice(side))) {
      const note = $("#elsewhere-" + side);
      note.textContent = "";
      note.append(`The map for the earlier choice (${status.image_name || "its image"}, ${picked.model}) finished and is kept ` +
                  "with its image; it is not drawn here because this side's choice changed. ",
                  el("a", { href: status.link || "#", text: "Open it on the image page." }));
      note.hidden = false;
      return null;
    }
    return status.result_id;
  }

  async function show(side, id, scale) {
    const q = scale ? `?vmin=${scale.vmin}&vmax=${scale.vmax}` : "";
    const r = await api("/api/results/" + id + q);
    results[side] = r;
    values[side] = r.values;
    const stack = $("#stack-" + side);
    stack.querySelector(".base").src = r.image_png;
    stack.querySelector(".over").src = r.map_png;
    stack.hidden = false;
    const bar = $("#colorbar-" + side);
    bar.src = r.colorbar;
    bar.alt = `Colour bar of this side: ${r.unit}, from ${fmt(r.vmin)} to ${fmt(r.vmax)}`;
    bar.hidden = false;
    showError($("#warning-" + side), r.warning || "");
    $("#facts-" + side).textContent =
      `${r.title} · ${r.model} · ${r.image_name} · target ${r.target_label}` + (r.engine ? ` · engine ${r.engine}` : "") +
      ` · ${fmtSeconds(r.seconds)} · scale ${fmt(r.vmin)} to ${fmt(r.vmax)} (${r.unit})`;
  }

  function scaleNote(scale, picked) {
    const models = new Set(sides.map((s) => picked[s].model));
    if (!scale) return "Each map on its own colour scale: compare shapes, not colours.";
    let note = `Shared colour scale: ${fmt(scale.vmin)} to ${fmt(scale.vmax)}` + (scale.signed ? " (diverging, centred at zero)." : ".");
    if (models.size > 1) {
      note += " The two maps come from different models (" + [...models].join(" and ") + "): one scale puts their " +
        "values in the same unit, but a larger value on one side may reflect that model's scale rather than stronger " +
        "evidence. Untick the shared scale to compare each map's own pattern.";
    }
    return note;
  }

  async function run(event) {
    event.preventDefault();
    showError($("#compare-error"), "");
    $("#scale-note").textContent = "";
    const method = methods.find((m) => m.name === $("#method-select").value);
    const params = P.readParams($("#method-params"), method);
    const picked = { a: choice("a"), b: choice("b") };
    for (const side of sides) { clearSide(side); $("#elsewhere-" + side).hidden = true; }
    cancelled = false;
    $("#compare-run").disabled = true;
    $("#compare-cancel").disabled = false;
    try {
      const ids = await Promise.all(sides.map((s) => runSide(s, method, params, picked[s])));
      const shown = sides.filter((s, i) => ids[i]);
      let scale = null;
      if ($("#shared-scale").checked && shown.length === 2) {
        scale = await api("/api/scale?" + ids.map((id) => "results=" + id).join("&"));
      }
      $("#scale-note").textContent = shown.length === 2 ? scaleNote(scale, picked) : "";
      await Promise.all(shown.map((s) => show(s, ids[sides.indexOf(s)], scale)));
      document.body.dataset.compared = "true";
    } catch (err) {
      showError($("#compare-error"), err.message);
    } finally {
      $("#compare-run").disabled = false;
      $("#compare-cancel").disabled = true;
    }
  }

  async function cancel() {
    cancelled = true;
    for (const side of sides) {
      if (!running[side]) continue;
      try {
        await api(`/api/jobs/${running[side]}/cancel`, { method: "POST" });
      } catch (err) {
        showError($("#compare-error"), err.message);
      }
    }
  }

  async function start() {
    methods = (await api("/api/methods")).methods.map(offeredMethod);
    fillSelect($("#method-select"), methods.map((m) => [m.name, m.title]), "occlusion");
    const showParams = () => P.paramInputs($("#method-params"), methods.find((m) => m.name === $("#method-select").value));
    showParams();
    $("#method-select").addEventListener("change", showParams);
    for (const side of sides) {
      await Promise.all([imageChoices(side), targets(side)]);
      $("#model-" + side).addEventListener("change", () => { imageChoices(side); targets(side); });
      $("#image-" + side).addEventListener("change", () => { $("#image-" + side).dataset.touched = "1"; });
      $("#upload-" + side + "-button").addEventListener("click", () => $("#upload-" + side).click());
      $("#upload-" + side).addEventListener("change", async (e) => {
        const file = e.target.files[0];
        if (!file) return;
        const form = new FormData();
        form.append("file", file, file.name);
        try {
          const info = await api("/api/images", { method: "POST", body: form });
          $("#image-" + side).value = "";
          await Promise.all(sides.map(imageChoices));
          $("#image-" + side).value = "id:" + info.id;
          $("#image-" + side).dataset.touched = "1";
        } catch (err) {
          showError($("#compare-error"), err.message);
        }
      });
      P.hoverReadout($("#stack-" + side), () => values[side], (row, col, v) => {
        $("#readout-" + side).textContent = v === null ? "" :
          `pixel (${col}, ${row}): ${fmt(v, 4)}` + (results[side] ? ` · ${results[side].unit}` : "");
      });
    }
    $("#compare-form").addEventListener("submit", run);
    $("#compare-cancel").addEventListener("click", cancel);
    document.body.dataset.ready = "true";
  }

  start().catch((err) => showError($("#compare-error"), err.message));
})();
