// Folder audits page: start an audit job, follow it, list stored runs, open, compare, resume, delete.
"use strict";

(() => {
  const { api, el, $, clear, fmt, fmtInt, showError, fillSelect, paramInputs, readParams } = P;
  const pct = (x) => (x === null || x === undefined ? "—" : (100 * x).toFixed(1) + "%");
  let methods = [];
  let options = null;
  let currentJob = null;

  function methodByName(name) { return methods.find((m) => m.name === name); }

  async function loadOptions() {
    options = await api("/api/audits/options");
    methods = (await api("/api/methods")).methods;
    fillSelect($("#method-select"), methods.map((m) => [m.name, m.title]), "gradcam");
    paramInputs($("#method-params"), methodByName("gradcam"));
    await modelChanged();
  }

  async function modelChanged() {
    const name = $("#model-select").value;
    const model = options.models.find((m) => m.name === name);
    fillSelect($("#inject-class"), model ? model.labels : [], model && model.labels.includes("crack") ? "crack" : undefined);
    const list = clear($("#gallery-layers"));
    try {
      const layers = await api("/api/audits/layers?model=" + encodeURIComponent(name));
      for (const layer of layers.layers) list.append(el("option", { value: layer }));
    } catch (_) { /* a model without hooks simply offers no gallery layers */ }
  }

  function readPair(text, n, what) {
    const parts = text.split(",").map((s) => Number.parseInt(s.trim(), 10));
    if (parts.length !== n || parts.some(Number.isNaN)) throw new Error(`${what} needs ${n} whole numbers separated by commas`);
    return parts;
  }

  async function fileAsDataUrl(file) {
    return new Promise((resolve, reject) => {
      const reader = new FileReader();
      reader.onload = () => resolve(reader.result);
      reader.onerror = () => reject(new Error("could not read the patch file"));
      reader.readAsDataURL(file);
    });
  }

  async function buildRequest() {
    const kind = $("#source-kind").value;
    const source = kind === "demo"
      ? { kind, split: $("#demo-split").value, per_class: Number($("#demo-per-class").value), seed: Number($("#demo-seed").value) }
      : { kind, path: $("#folder-path").value };
    const method = $("#method-select").value;
    const body = {
      model: $("#model-select").value, source, method, target: $("#target-select").value,
      params: readParams($("#method-params"), methodByName(method)),
      background_swap: $("#swap-check").checked,
      gallery_layer: $("#gallery-layer").value.trim() || null,
      policy: $("#policy-select").value || null,
    };
    const inject = $("#inject-kind").value;
    if (inject) {
      const req = { kind: inject, suspect_class: $("#inject-class").value };
      const at = $("#inject-at").value.trim();
      if (at) req.at = readPair(at, 2, "the paste location");
      if (inject === "crop") {
        req.image = $("#inject-image").value.trim();
        req.box = readPair($("#inject-box").value, 4, "the patch box");
      } else if (inject === "upload") {
        const file = $("#inject-file").files[0];
        if (!file) throw new Error("choose a PNG file for the patch");
        req.patch_png = await fileAsDataUrl(file);
      }
      body.injection = req;
    }
    return body;
  }

  function showJob(status) {
    const box = $("#audit-job");
    box.hidden = false;
    box.dataset.state = status.state;
    $("#audit-bar").value = status.state === "done" ? 1 : status.fraction || 0;
    let text = (status.phase ? status.phase + ": " : "") + P.progressText(status, "images");
    if (status.run_id) text += ` · run ${status.run_id}`;
    $("#audit-text").textContent = text;
  }

  async function follow(jobId) {
    currentJob = jobId;
    $("#cancel-button").hidden = false;
    $("#start-button").disabled = true;
    try {
      for (;;) {
        const status = await api("/api/audits/jobs/" + encodeURIComponent(jobId));
        showJob(status);
        if (["done", "failed", "cancelled"].includes(status.state)) {
          if (status.state === "failed") showError($("#start-error"), status.error);
          await loadRuns();
          if (status.run_id && status.state === "done") await openRun(status.run_id);
          return status;
        }
        await new Promise((resolve) => setTimeout(resolve, 250));
      }
    } finally {
      currentJob = null;
      $("#cancel-button").hidden = true;
      $("#start-button").disabled = false;
    }
  }

  async function start(event) {
    event.preventDefault();
    showError($("#start-error"), "");
    try {
      const job = await api("/api/audits", { json: await buildRequest() });
      showJob(job);
      await follow(job.id);
    } catch (err) {
      showError($("#start-error"), err.message);
    }
  }

  async function cancel() {
    if (!currentJob) return;
    try { await api(`/api/audits/jobs/${encodeURIComponent(currentJob)}/cancel`, { method: "POST" }); }
    catch (err) { showError($("#start-error"), err.message); }
  }

  // -- stored runs ------------------------------------------------------------------------------

  function ticked() { return [...document.querySelectorAll("#runs-table input[type=checkbox]:checked")].map((c) => c.value); }

  async function loadRuns() {
    showError($("#runs-error"), "");
    let data;
    try { data = await api("/api/audits/runs"); } catch (err) { showError($("#runs-error"), err.message); return; }
    const body = clear($("#runs-table tbody"));
    $("#runs-empty").hidden = data.runs.length > 0;
    for (const run of data.runs) {
      const box = el("input", { type: "checkbox", value: run.id, "aria-label": "tick run " + run.id + " to compare",
                                onchange: () => { $("#compare-button").disabled = ticked().length !== 2; } });
      const actions = el("td", { class: "actions" }, [
        run.summary !== null || run.status === "done" ? el("button", { type: "button", class: "link", text: "open", onclick: () => openRun(run.id) }) : null,
        run.resumable ? el("button", { type: "button", class: "link", text: "resume", onclick: () => resumeRun(run.id) }) : null,
        el("button", { type: "button", class: "link danger", text: "delete", onclick: () => deleteRun(run.id) }),
      ]);
      body.append(el("tr", { dataset: { status: run.status } }, [
        el("td", {}, box), el("td", { class: "mono", text: run.id }), el("td", { class: "status", text: run.status }),
        el("td", { text: run.model_name }), el("td", { text: run.method }),
        el("td", { class: "num", text: `${fmtInt(run.done)}/${fmtInt(run.total)}` }),
        el("td", { class: "num", text: pct(run.accuracy) }), el("td", { class: "num", text: fmtInt(run.class_flags) }),
        el("td", { class: "gate-" + (run.gate || "none"), text: run.gate ? run.gate.toUpperCase() : "—" }), actions,
      ]));
    }
  }

  async function resumeRun(id) {
    showError($("#runs-error"), "");
    try {
      const job = await api(`/api/audits/runs/${encodeURIComponent(id)}/resume`, { method: "POST" });
      showJob(job);
      await follow(job.id);
    } catch (err) { showError($("#runs-error"), err.message); }
  }

  async function deleteRun(id) {
    if (!window.confirm(`Delete run ${id}, its results and pictures?`)) return;
    try { await api(`/api/audits/runs/${encodeURIComponent(id)}`, { method: "DELETE" }); }
    catch (err) { showError($("#runs-error"), err.message); }
    $("#run-view").hidden = $("#run-view").dataset.run === id ? true : $("#run-view").hidden;
    await loadRuns();
  }

  async function compare() {
    const [first, second] = ticked();
    const diff = await api(`/api/audits/compare?first=${encodeURIComponent(first)}&second=${encodeURIComponent(second)}`);
    const body = clear($("#compare-body"));
    body.append(el("p", { text: `${diff.first.id} → ${diff.second.id}: same model ${diff.same_model ? "yes" : "no"}, same images ${diff.same_dataset ? "yes" : "no"}.` }));
    const verdictOf = (g) => (g ? `${g.passed ? "PASS" : "FAIL"} under “${g.policy}”` : "no policy");
    body.append(el("p", { class: "verdict-change", text: `Verdict: ${verdictOf(diff.gate.first)} → ${verdictOf(diff.gate.second)}.` }));
    for (const [side, g] of [["first", diff.gate.first], ["second", diff.gate.second]]) {
      if (g && g.failed.length) body.append(el("ul", { class: "checks" }, g.failed.map((f) => el("li", { class: "check-fail", text: `${side} run: ${f}` }))));
    }
    const rows = [["accuracy", diff.accuracy], ["flagged share", diff.flagged_fraction], ["injection flip rate", diff.injection_flip_rate]];
    for (const [c, v] of Object.entries(diff.per_class)) {
      if (v.only_in) continue;
      rows.push([`${c}: accuracy`, v.accuracy]);
      if (v.object_share.first !== null || v.object_share.second !== null) rows.push([`${c}: on object`, v.object_share]);
      rows.push([`${c}: bottom-right share`, v.bottom_right_share]);
    }
    body.append(el("table", { class: "ledger" }, [
      el("thead", {}, el("tr", {}, ["measure", "first", "second", "change"].map((h) => el("th", { scope: "col", text: h })))),
      el("tbody", {}, rows.map(([name, v]) => el("tr", {}, [el("td", { text: name }), el("td", { class: "num", text: pct(v.first) }),
        el("td", { class: "num", text: pct(v.second) }), el("td", { class: "num", text: v.change === null ? "—" : (v.change >= 0 ? "+" : "") + (100 * v.change).toFixed(1) + " pt" })]))),
    ]));
    const changed = Object.entries(diff.settings_changed);
    if (changed.length) body.append(el("p", { class: "note", text: "Settings changed: " + changed.map(([k, v]) => `${k} ${JSON.stringify(v.first)} → ${JSON.stringify(v.second)}`).join("; ") }));
    body.append(el("p", { class: "note", text: `${diff.changed_predictions.length} of ${diff.images_in_both} shared images changed their prediction.` }));
    $("#compare-view").hidden = false;
  }

  // -- one run ------------------------------------------------------------------------------------

  function facts(list, pairs) {
    clear(list);
    for (const [k, v] of pairs) list.append(el("dt", { text: k }), el("dd", { class: typeof v === "string" && v.length > 40 ? "mono" : "", text: v }));
  }

  function classTable(s) {
    const objects = Boolean(s.object && s.object.images);
    const head = ["class", "images", "accuracy", ...(objects ? ["on object", "pointing game", "energy pointing"] : []), "border", "largest corner", "no evidence"];
    const rows = Object.entries(s.per_class).map(([c, v]) => {
      const corners = ["top_left", "top_right", "bottom_left", "bottom_right"];
      const worst = corners.reduce((a, b) => ((v.regions[b].mean_share || 0) > (v.regions[a].mean_share || 0) ? b : a));
      const flagged = v.regions[worst].flagged;
      return el("tr", { class: flagged ? "flagged-row" : "" }, [
        el("th", { scope: "row", text: c }), el("td", { class: "num", text: v.images }), el("td", { class: "num", text: pct(v.accuracy) }),
        ...(objects ? [el("td", { class: "num", text: pct(v.object_share) }), el("td", { class: "num", text: pct(v.pointing_accuracy) }),
          el("td", { class: "num", text: pct(v.energy_pointing) })] : []),
        el("td", { class: "num", text: pct(v.regions.border.mean_share) }),
        el("td", { class: "num", title: `${(v.regions[worst].concentration || 0).toFixed(1)}× its share of the area`,
                   text: `${pct(v.regions[worst].mean_share)} (${worst.replace("_", "-")})` }),
        el("td", { class: "num", text: v.no_evidence }),
      ]);
    });
    const t = clear($("#class-table"));
    t.append(el("thead", {}, el("tr", {}, head.map((h) => el("th", { scope: "col", text: h })))), el("tbody", {}, rows));
  }

  function confusion(s) {
    const t = clear($("#confusion-table"));
    const labels = s.confusion.labels;
    const max = Math.max(1, ...s.confusion.matrix.flat());
    t.append(el("thead", {}, el("tr", {}, [el("th", { scope: "col", text: "true \\ called" }), ...labels.map((l) => el("th", { scope: "col", text: l }))])));
    t.append(el("tbody", {}, s.confusion.matrix.map((row, i) => el("tr", {}, [el("th", { scope: "row", text: labels[i] }),
      ...row.map((n, j) => el("td", { class: "num cell-" + Math.min(4, Math.round((4 * n) / max)) + (i === j ? " diag" : ""), text: n }))]))));
  }

  function picture(src, alt) { return src ? el("img", { src, alt, class: "pixelated thumb" }) : null; }

  async function openRun(id) {
    const run = await api("/api/audits/runs/" + encodeURIComponent(id));
    const view = $("#run-view");
    view.dataset.run = run.id;
    view.hidden = false;
    const s = run.summary;
    $("#run-title").textContent = `Run ${run.id} · ${run.model_name} · ${run.method}`;
    $("#run-caution").textContent = run.caution;
    $("#report-html").href = `/api/audits/runs/${encodeURIComponent(run.id)}/report.html`;
    $("#report-pdf").href = `/api/audits/runs/${encodeURIComponent(run.id)}/report.pdf`;
    const verdict = clear($("#run-verdict"));
    if (!s) {
      verdict.append(el("p", { class: "warning", text: `This run is ${run.status} (${run.done} of ${run.total} images stored).` + (run.resumable ? " Resume it from the list above." : "") }));
      return;
    }
    const gate = run.gate;
    if (gate) {
      const sha = gate.policy.sha256 ? ` (policy sha256 ${gate.policy.sha256.slice(0, 12)}…)` : "";
      verdict.append(el("p", { class: "gate-" + (gate.passed ? "pass" : "fail"), text: `Gate ${gate.passed ? "PASS" : "FAIL"} under policy “${gate.policy.name}”${sha}: ${gate.checks.filter((c) => c.status === "fail").length} of ${gate.checks.length} checks failed. Stored with the run.` }));
      verdict.append(el("ul", { class: "checks" }, gate.checks.map((c) => el("li", { class: "check-" + c.status.replace("/", ""), title: c.meaning }, [el("strong", { text: c.status.toUpperCase() + " " }), c.sentence]))));
    } else {
      verdict.append(el("p", { class: "note", text: "No policy judged this run. Start the audit with a policy, or judge the stored run from the command line: pellucid report RUN --policy FILE." }));
    }
    facts($("#run-facts"), [
      ["Status", `${run.status}, ${run.done} of ${run.total} images`],
      ["Accuracy", pct(s.accuracy)], ["Flagged images", `${s.flagged_count} (${pct(s.flagged_fraction)})`],
      ["Model fingerprint", run.model_fingerprint], ["Dataset", `${run.dataset_root} (hash ${run.dataset_hash.slice(0, 16)}…)`],
      ["Throughput", s.timing && s.timing.images_per_second ? `${s.timing.images_per_second.toFixed(1)} images/s` : "—"],
      ["Started", new Date(run.created * 1000).toLocaleString()],
    ]);
    classTable(s);
    confusion(s);
    const flags = clear($("#class-flags"));
    if (!s.class_flags.length) flags.append(el("li", { class: "note", text: "No corner or border holds an outsized share of any class's evidence." }));
    for (const f of s.class_flags) flags.append(el("li", { class: "warning", text: f.sentence }));

    const mm = await api(`/api/audits/runs/${encodeURIComponent(run.id)}/mean-maps`);
    const strip = clear($("#mean-maps"));
    for (const m of mm.maps) strip.append(el("figure", { class: "strip-item" }, [el("img", { src: m.png, alt: "mean evidence for " + m.class, class: "pixelated" }), el("figcaption", { text: m.class })]));
    $("#mean-colorbar").src = mm.scale.colorbar;

    const fl = await api(`/api/audits/runs/${encodeURIComponent(run.id)}/flagged`);
    $("#flagged-note").textContent = `${fl.flagged_count} image(s) flagged, most suspect first: ` + (s.object && s.object.images ? "most evidence off the annotated object, or piled up in a corner or the border." : "evidence piled up in a corner or the border.");
    const grid = clear($("#flagged"));
    for (const f of fl.images) {
      grid.append(el("figure", { class: "flagged-item" }, [
        el("div", { class: "pair" }, [picture(f.image, "the image as the model saw it"), picture(f.overlay, "evidence overlaid")]),
        el("figcaption", {}, [el("span", { class: "mono", text: f.rel }), el("br"), `true ${f.label}, called ${f.predicted_label}`, el("br"),
          el("span", { class: "note", text: f.reasons.join("; ") })]),
      ]));
    }

    await showDiscovery(run, s);

    const inj = s.injection;
    $("#injection-box").hidden = !inj;
    if (inj) {
      $("#injection-text").textContent = `${inj.settings.patch_size.join("×")} px patch (${inj.settings.source}). ${run.injection_sentence}`;
      const t = clear($("#injection-table"));
      t.append(el("thead", {}, el("tr", {}, ["class", "other-class images", "skipped (already carry it)", "tested", "eligible", "flips", "flip rate", "mean shift"].map((h) => el("th", { scope: "col", text: h })))));
      const dash = (x) => (x === undefined || x === null ? "—" : x);
      t.append(el("tbody", {}, Object.entries(inj.per_class).map(([c, v]) => el("tr", {}, [el("th", { scope: "row", text: c }), el("td", { class: "num", text: dash(v.considered) }), el("td", { class: "num", text: dash(v.skipped) }), el("td", { class: "num", text: v.tested }), el("td", { class: "num", text: v.eligible }), el("td", { class: "num", text: v.flips }), el("td", { class: "num", text: pct(v.flip_rate) }), el("td", { class: "num", text: v.mean_shift === null ? "—" : fmt(v.mean_shift) })]))));
      const ex = clear($("#injection-examples"));
      for (const e of inj.examples) {
        const base = `/api/audits/runs/${encodeURIComponent(run.id)}/artefact?name=`;
        ex.append(el("figure", { class: "flagged-item" }, [
          el("div", { class: "pair" }, [picture(base + encodeURIComponent(`injection/example/${e.index}/before`), "before pasting"), picture(base + encodeURIComponent(`injection/example/${e.index}/after`), "after pasting")]),
          el("figcaption", {}, [el("span", { class: "mono", text: e.rel }), el("br"), `${e.before} → ${e.after}; p ${fmt(e.p_suspect_before, 2)} → ${fmt(e.p_suspect_after, 2)}`]),
        ]));
      }
    }
    const sw = s.background_swap;
    $("#swap-box").hidden = !sw;
    if (sw) $("#swap-text").textContent = `${sw.tested} image(s) with ${sw.object_source}: accuracy ${pct(sw.accuracy_before)} → ${pct(sw.accuracy_after)}; ${sw.changed_predictions} prediction(s) changed when the background was replaced.`;

    $("#gallery-box").hidden = !s.gallery;
    if (s.gallery) {
      const g = await api(`/api/audits/runs/${encodeURIComponent(run.id)}/gallery`);
      $("#gallery-note").textContent = `Layer ${g.layer}: the most class-selective channels, each with a synthetic picture that maximises it (left) and the receptive-field patches (${g.rf_size ? g.rf_size.join("×") : "whole image"} px) where it fired hardest in the folder. ${g.caution}`;
      const box = clear($("#gallery"));
      for (const c of g.channels) {
        box.append(el("div", { class: "channel-row" }, [
          el("div", { class: "channel-head" }, [el("strong", { text: `channel ${c.channel}` }), el("br"), `prefers ${c.preferred_class}`, el("br"), el("span", { class: "note", text: `selectivity ${fmt(c.selectivity, 2)}` })]),
          picture(c.visual, "synthetic picture that maximises channel " + c.channel),
          ...c.patches.map((p) => el("img", { src: p.png, class: "pixelated patch", alt: `patch from ${p.rel}`, title: `${p.rel} at (${p.y}, ${p.x}): ${fmt(p.value)}` })),
          el("span", { class: "note means", text: Object.entries(c.class_means).map(([k, v]) => `${k} ${fmt(v, 2)}`).join(" · ") }),
        ]));
      }
    }
    const unreadable = run.unreadable || [];
    $("#unreadable-box").hidden = unreadable.length === 0;
    const ut = clear($("#unreadable-table"));
    if (unreadable.length) {
      ut.append(el("thead", {}, el("tr", {}, ["image", "stage", "reason"].map((h) => el("th", { scope: "col", text: h })))));
      ut.append(el("tbody", {}, unreadable.map((u) => el("tr", {}, [el("td", { class: "mono", text: u.rel }), el("td", { text: u.stage }), el("td", { text: u.reason })]))));
    }
    $("#run-settings").textContent = `${run.command ? "Command: " + run.command + "\n\n" : ""}Model ${run.model_name}, sha256 ${run.model_fingerprint}\nSpec ${run.model_spec}\nDataset ${run.dataset_root}, hash ${run.dataset_hash}\nPellucid ${run.tool_version}\n\n` + JSON.stringify(run.settings, null, 2);
    view.scrollIntoView({ behavior: "smooth", block: "start" });
  }

  // Discovery and confirmation: clusters of each class's maps, most suspicious first.
  function clusterTests(c) {
    const t = c.confirmation;
    if (!t) return el("p", { class: "note", text: c.suspicion >= 0.3 ? "Not tested: other clusters ranked higher." : "Not tested: below the suspicion needed for a test." });
    if (!t.removal) return el("p", { class: "note", text: t.sentence });
    const r = t.removal;
    const tr = t.transplant;
    const pics = c.pictures || {};
    return el("div", {}, [
      el("p", {}, [el("strong", { class: t.confirmed ? "verdict-confirmed" : "", text: t.verdict + ". " }), t.sentence]),
      el("table", { class: "ledger" }, [
        el("thead", {}, el("tr", {}, ["test", "what was done", "result"].map((h) => el("th", { scope: "col", text: h })))),
        el("tbody", {}, [
          el("tr", {}, [el("th", { scope: "row", text: "removal" }), el("td", { text: r.how }),
            el("td", { class: "num", text: `${pct(r.calls_lost_share)} of ${r.calls} call(s) lost; p ${fmt(r.p_before, 2)} → ${fmt(r.p_after, 2)}` })]),
          tr ? el("tr", {}, [el("th", { scope: "row", text: "transplant" }), el("td", { text: tr.how }),
            el("td", { class: "num", text: `${pct(tr.flip_rate)} of ${tr.eligible} flip (control ${pct(tr.control.flip_rate)}; net ${pct(tr.net_flip_rate)})` })]) : null,
        ]),
      ]),
      el("div", { class: "pair" }, [picture(pics.before, "a typical image"), picture(pics.after, "the same image with its region taken away"), picture(pics.region, "the region tested")]),
    ]);
  }

  async function showDiscovery(run, s) {
    $("#discovery-box").hidden = !s.discovery;
    if (!s.discovery) return;
    const d = await api(`/api/audits/runs/${encodeURIComponent(run.id)}/discovery`);
    $("#discovery-caution").textContent = d.caution;
    const conf = d.confirmation;
    $("#discovery-summary").textContent = `${d.total_clusters} cluster(s) in ${d.classes.length} class(es); ` +
      (conf ? `${conf.candidates} tested, ${conf.confirmed} confirmed as shortcut(s)${conf.confirmed ? ": " + conf.confirmed_clusters.join(", ") : ""}.` : "confirmation was off.") +
      (d.pictures_note ? " " + d.pictures_note + "." : "");
    $("#discovery-colorbar").src = d.scale.colorbar;
    const box = clear($("#discovery"));
    for (const c of d.clusters) {
      const p = c.placement;
      const ch = c.channels && c.channels.channels && c.channels.channels.length
        ? el("p", { class: "note", text: `Channels of ${c.channels.layer} that fire most above ${c.channels.compared_with} (Cohen's d): ` + c.channels.channels.slice(0, 5).map((x) => `${x.channel} (${fmt(x.effect, 2)})`).join(", ") })
        : null;
      box.append(el("div", { class: "cluster-row" }, [
        el("div", { class: "cluster-head" }, [
          el("strong", { text: `${c.key}` }), ` · ${c.size} image(s), ${pct(c.share)} of the class`, el("br"),
          `suspicion ${fmt(c.suspicion, 2)}`, el("br"),
          el("span", { class: "note", text: c.reasons.join("; ") + `; strongest region: ${p.region.replace("_", "-")}.` }),
        ]),
        c.mean_png ? el("img", { src: c.mean_png, class: "pixelated mean", alt: `mean evidence of cluster ${c.key}` }) : null,
        el("div", { class: "pair" }, c.thumbnails.filter((t) => t.png).map((t) => el("img", { src: t.png, class: "pixelated thumb", alt: t.rel, title: t.rel }))),
        el("div", { class: "cluster-tests" }, [clusterTests(c), ch]),
      ]));
    }
  }

  // A policy's [audit] table says which method its thresholds were set for: preselect it.
  function policyChanged() {
    const chosen = (options && options.policies || []).find((p) => p.name === $("#policy-select").value);
    if (!chosen || !chosen.method) return;
    $("#method-select").value = chosen.method;
    paramInputs($("#method-params"), methodByName(chosen.method), chosen.params || {});
    if (chosen.target) $("#target-select").value = chosen.target;
  }

  function sourceChanged() {
    const demo = $("#source-kind").value === "demo";
    $("#demo-options").hidden = !demo;
    $("#folder-label").hidden = demo;
  }

  function injectChanged() {
    const kind = $("#inject-kind").value;
    $("#inject-options").hidden = !kind;
    $("#inject-crop").hidden = kind !== "crop";
    $("#inject-upload").hidden = kind !== "upload";
  }

  document.addEventListener("DOMContentLoaded", async () => {
    $("#audit-form").addEventListener("submit", start);
    $("#cancel-button").addEventListener("click", cancel);
    $("#refresh-runs").addEventListener("click", loadRuns);
    $("#compare-button").addEventListener("click", () => compare().catch((err) => showError($("#runs-error"), err.message)));
    $("#source-kind").addEventListener("change", sourceChanged);
    $("#policy-select").addEventListener("change", policyChanged);
    $("#inject-kind").addEventListener("change", injectChanged);
    $("#model-select").addEventListener("change", () => modelChanged().catch(() => {}));
    $("#method-select").addEventListener("change", () => paramInputs($("#method-params"), methodByName($("#method-select").value)));
    sourceChanged();
    injectChanged();
    try { await loadOptions(); } catch (err) { showError($("#start-error"), err.message); }
    await loadRuns();
    const wanted = new URLSearchParams(window.location.search).get("run");
    if (wanted) openRun(wanted).catch((err) => showError($("#runs-error"), err.message));
  });
})();
