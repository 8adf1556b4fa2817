// Side by side: one method on two (model, image) pairs, on one shared colour scale.
"use strict";

(() => {
  const { api, el, $, clear, fmt, fmtSeconds, showError, fillSelect } = P;
  const sides = ["a", "b"];
  const values = { a: null, b: null };
  const results = { a: null, b: null };
  let methods = [];

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

  async function imageId(side) {
    const value = $("#image-" + side).value;
    if (value.startsWith("id:")) return value.slice(3);
    if (value.startsWith("sample:")) {
      const info = await api("/api/samples/open", { json: { model: $("#model-" + side).value, name: value.slice(7) } });
      return info.id;
    }
    throw new Error("choose an image for the " + (side === "a" ? "left" : "right") + " side first");
  }

  async function runSide(side, method, params) {
    const box = $("#job-" + side);
    const bar = box.querySelector("progress");
    const text = box.querySelector("span");
    box.hidden = false;
    const target = $("#target-" + side).value;
    let status = await api("/api/jobs", {
      json: { model: $("#model-" + side).value, image: await imageId(side), method: method.name,
              target: target === "" ? null : Number(target), params },
    });
    const cached = status.cached;
    status = await P.followJob(status.id, (s) => {
      s.cached = cached;
      bar.value = s.fraction;
      text.textContent = P.progressText(s, method.name === "occlusion" ? "positions" : "steps");
      box.dataset.state = s.state;
    });
    if (status.state !== "done") throw new Error(status.error || "the " + side + " side was " + status.state);
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
    bar.hidden = false;
    $("#facts-" + side).textContent =
      `${r.title} · ${r.model} · ${r.image_name} · target ${r.target_label}` + (r.engine ? ` · engine ${r.engine}` : "") +
      ` · ${fmtSeconds(r.seconds)} · scale ${fmt(r.vmin)} to ${fmt(r.vmax)}`;
  }

  async function run(event) {
    event.preventDefault();
    showError($("#compare-error"), "");
    const method = methods.find((m) => m.name === $("#method-select").value);
    const params = P.readParams($("#method-params"), method);
    $("#compare-run").disabled = true;
    try {
      const ids = await Promise.all(sides.map((s) => runSide(s, method, params)));
      let scale = null;
      if ($("#shared-scale").checked) {
        scale = await api("/api/scale?" + ids.map((id) => "results=" + id).join("&"));
        $("#scale-note").textContent = `Shared colour scale: ${fmt(scale.vmin)} to ${fmt(scale.vmax)}` +
          (scale.signed ? " (diverging, centred at zero)." : ".");
      } else {
        $("#scale-note").textContent = "Each map on its own colour scale: compare shapes, not colours.";
      }
      await Promise.all(sides.map((s, i) => show(s, ids[i], scale)));
      document.body.dataset.compared = "true";
    } catch (err) {
      showError($("#compare-error"), err.message);
    } finally {
      $("#compare-run").disabled = false;
    }
  }

  async function start() {
    methods = (await api("/api/methods")).methods;
    fillSelect($("#method-select"), methods.map((m) => [m.name, m.title]), "occlusion");
    const showParams = () => P.paramInputs($("#method-params"), methods.find((m) => m.name === $("#method-select").value));
    showParams();
    $("#method-select").addEventListener("change", showParams);
    for (const side of sides) {
      await Promise.all([imageChoices(side), targets(side)]);
      $("#model-" + side).addEventListener("change", () => { imageChoices(side); targets(side); });
      $("#image-" + side).addEventListener("change", () => { $("#image-" + side).dataset.touched = "1"; });
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
        $("#readout-" + side).textContent = v === null ? "" : `pixel (${col}, ${row}): ${fmt(v, 4)}`;
      });
    }
    $("#compare-form").addEventListener("submit", run);
    document.body.dataset.ready = "true";
  }

  start().catch((err) => showError($("#compare-error"), err.message));
})();
