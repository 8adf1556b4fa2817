// Folder audits page: plan an audit (what it will do, what it costs), start and follow it, list
// stored runs, open one (its URL is /audits?run=ID), compare, resume, cancel, delete.
"use strict";

(() => {
  const { api, el, $, clear, fmt, fmtInt, fmtSeconds, showError, fillSelect, paramInputs, readParams } = P;
  const pct = (x) => (x === null || x === undefined ? "—" : (100 * x).toFixed(1) + "%");
  const REGIONS = ["top_left", "top_right", "bottom_left", "bottom_right", "border", "centre"];
  const regionName = (r) => (r === "border" ? "border band" : r === "centre" ? "centre box" : r.replace("_", "-") + " corner");
  let methods = [];
  let options = null;
  let currentJob = null;
  let chosenPatch = null;   // the uploaded patch the audit's injection test uses
  let folderHere = "";      // where the folder browser is looking
  let planTimer = null;
  let planSerial = 0;
  let lastRuns = [];

  const methodByName = (name) => methods.find((m) => m.name === name);
  const modelEntry = () => options && options.models.find((m) => m.name === $("#model-select").value);
  const policyEntry = () => (options && options.policies || []).find((p) => p.name === $("#policy-select").value);

  // -- options: models, labels, methods, policies -------------------------------------------------

  async function loadOptions() {
    options = await api("/api/audits/options");
    methods = (await api("/api/methods")).methods;
    fillPolicies("");
    AuditPolicy.init(options, methods, { onSaved: policySaved });
    await modelChanged();
  }

  function fillPolicies(selected) {
    const select = clear($("#policy-select"));
    select.append(el("option", { value: "", text: "none: report only" }));
    for (const [origin, title] of [["bundled", "shipped with Pellucid"], ["saved", "saved in the data folder"]]) {
      const mine = options.policies.filter((p) => p.origin === origin);
      if (mine.length) select.append(el("optgroup", { label: title }, mine.map((p) => el("option", { value: p.name, text: p.error ? `${p.name} (unreadable)` : p.name }))));
    }
    select.value = selected || "";
  }

  async function policySaved(name) {
    options.policies = (await api("/api/audits/policies")).policies;
    AuditPolicy.setPolicies(options.policies);
    const keep = name || $("#policy-select").value;  // a deleted policy leaves the gate empty
    fillPolicies(options.policies.some((p) => p.name === keep) ? keep : "");
    policyChanged();
  }

  async function modelChanged() {
    const model = modelEntry();
    const list = clear($("#model-labels"));
    for (const label of model ? model.labels : []) list.append(el("option", { value: label }));
    $("#inject-class").placeholder = model && model.labels.length > 20 ? `search ${fmtInt(model.labels.length)} labels` : "a class label";
    if (model && !$("#inject-class").value && model.labels.includes("crack")) $("#inject-class").value = "crack";
    const chosen = $("#method-select").value;
    fillSelect($("#method-select"), [["", `the default for this model (${model ? model.default_method : "gradcam"})`],
      ...methods.map((m) => [m.name, m.title])], chosen);
    methodChanged();
    const layers = clear($("#gallery-layers"));
    try {
      const found = await api("/api/audits/layers?model=" + encodeURIComponent($("#model-select").value));
      for (const layer of found.layers) layers.append(el("option", { value: layer }));
    } catch (_) { /* a model without hooks simply offers no gallery layers */ }
    policyChanged();
  }

  function methodChanged() {
    const name = $("#method-select").value || (modelEntry() || {}).default_method;
    const policy = policyEntry();
    const given = policy && policy.method === name && !$("#method-select").dataset.touched ? policy.params : {};
    if (methodByName(name)) paramInputs($("#method-params"), methodByName(name), given || {});
    schedulePlan();
  }

  // A chosen policy shows what it brings: its method, its target and its injection test.
  function policyChanged() {
    const p = policyEntry();
    const option = $("#inject-kind option[value=policy]");
    const none = $("#inject-kind option[value='']");
    if (p && p.injection) {
      const at = p.injection.at === "random" ? "random places" : p.injection.at.join(",");
      option.hidden = false;
      option.textContent = `the policy's patch ${p.injection.patch}: suspect class '${p.injection.suspect_class}', at ${at}`;
      none.disabled = true;
      none.textContent = "none (the policy asks for an injection test)";
      if (!$("#inject-kind").value) $("#inject-kind").value = "policy";
    } else {
      option.hidden = true;
      none.disabled = false;
      none.textContent = "none";
      if ($("#inject-kind").value === "policy") $("#inject-kind").value = "";
    }
    if (!p && !$("#method-select").dataset.touched && $("#method-select").value) {
      $("#method-select").value = "";  // back to this model's default
      methodChanged();
    }
    if (p && p.method) {
      $("#method-select").value = p.method;
      delete $("#method-select").dataset.touched;
      delete $("#method-params").dataset.touched;
      paramInputs($("#method-params"), methodByName(p.method), p.params || {});
    }
    if (p && p.target && !$("#target-select").value) $("#target-select").value = p.target;
    $("#policy-summary").textContent = p
      ? (p.error ? p.error : `${p.title}: ${Object.keys(p.thresholds).length} threshold(s)` +
        (Object.keys(p.classes || {}).length ? `, overrides for ${Object.keys(p.classes).join(", ")}` : "") +
        (p.method ? `; set for ${p.method}` : "") + (p.injection ? "; adds an injection test" : "") + ".")
      : "A policy turns the measures into pass or fail; its [audit] table can set the method and its [injection] table adds an injection test.";
    injectChanged();
  }

  // -- the request and its plan ---------------------------------------------------------------------

  function readPair(text, n, what) {
    const parts = text.split(",").map((s) => Number.parseInt(s.trim(), 10));
    if (parts.length !== n || parts.some(Number.isNaN)) throw new Error(`${what} needs ${n} whole numbers separated by commas`);
    return parts;
  }

  function buildRequest() {
    const kind = $("#source-kind").value;
    const source = kind === "demo"
      ? { kind, split: $("#demo-split").value, per_class: Number($("#demo-per-class").value), seed: Number($("#demo-seed").value) }
      : { kind, path: $("#folder-path").value.trim() };
    if (kind === "folder" && !source.path) throw new Error("choose the folder to audit (Browse…), or type its path inside the image folder");
    // Left to the server (null) when the page shows the policy's or the model's default unchanged.
    const policy = policyEntry();
    const shown = $("#method-select").value;
    const touched = Boolean($("#method-select").dataset.touched || $("#method-params").dataset.touched);
    const method = !shown || (!touched && policy && policy.method === shown) ? null : shown;
    const body = {
      model: $("#model-select").value, source, method, target: $("#target-select").value || null,
      params: method || touched ? readParams($("#method-params"), methodByName(shown || modelEntry().default_method)) : {},
      background_swap: $("#swap-check").checked,
      gallery_layer: $("#gallery-layer").value.trim() || null,
      policy: $("#policy-select").value || null,
    };
    const inject = $("#inject-kind").value;
    if (inject && inject !== "policy") {
      const req = { kind: inject, suspect_class: $("#inject-class").value.trim() };
      if (!req.suspect_class) throw new Error("name the suspect class: the class the patch may cue");
      const at = $("#inject-at").value.trim();
      if (at === "random") req.at = "random";
      else if (at) req.at = readPair(at, 2, "the paste location");
      if (inject === "crop") {
        req.image = $("#inject-image").value.trim();
        req.box = readPair($("#inject-box").value, 4, "the patch box");
      } else if (inject === "upload") {
        if (!chosenPatch) throw new Error("upload a patch, or pick a stored one");
        req.patch_id = chosenPatch;
      }
      body.injection = req;
    }
    return body;
  }

  function schedulePlan() {
    clearTimeout(planTimer);
    planTimer = setTimeout(() => plan().catch(() => {}), 350);
  }

  const perForward = (s) => (s < 0.001 ? `${(s * 1000).toFixed(2)} ms` : fmtSeconds(s));

  function costText(cost) {
    const likely = fmtSeconds(cost.seconds);
    const upper = cost.seconds_max > cost.seconds * 1.05 ? `, up to ${fmtSeconds(cost.seconds_max)} if confirmation tests every cluster it may` : "";
    const parts = cost.phases.map((p) => `${p.phase} ${fmtInt(p.count)} ${p.unit} ≈ ${fmtSeconds(p.seconds)}${p.upper_bound_only ? " at most" : ""}`);
    return `Estimated time: about ${likely}${upper} (${parts.join("; ")}; one forward pass takes ${perForward(cost.seconds_per_forward)} here).`;
  }

  function renderPlan(planned, cost) {
    const list = clear($("#plan-list"));
    const item = (label, text) => list.append(el("li", {}, [el("strong", { text: label + ": " }), text]));
    const from = { request: "as chosen", policy: "from the policy's [audit] table", default: "this model's default" }[planned.method_source];
    const params = Object.entries(planned.params || {}).filter(([, v]) => v !== null).map(([k, v]) => `${k}=${v}`).join(", ");
    item("Images", `${fmtInt(planned.images)} in ${planned.classes.length} class(es) (${planned.classes.slice(0, 8).join(", ")}${planned.classes.length > 8 ? ", …" : ""}) from ${planned.folder}` +
      (planned.skipped.length ? `; ${planned.skipped.length} file(s) will be skipped and listed with their reason` : ""));
    item("Explained with", `${planned.method} (${from}${params ? "; " + params : ""}), each image's ${planned.target === "label" ? "true label" : "predicted class"}`);
    const inj = planned.injection;
    item("Injection test", inj ? `paste a ${inj.patch_size.join("×")} px patch (${inj.source}) ${inj.at === "random" ? "at random places" : "at " + inj.at.join(",")} onto the other classes' images; suspect class '${inj.suspect_class}'` : "none");
    item("Discovery and confirmation", planned.discovery ? (planned.confirmation ? "on: cluster each class's maps, then test the suspicious clusters" : "discovery on, confirmation off") : "off");
    if (planned.background_swap) item("Background swap", "on");
    if (planned.gallery_layer) item("Channel gallery", planned.gallery_layer);
    item("Gate", planned.policy ? `policy “${planned.policy}”` : "none: report only");
    item("Command", el("code", { class: "mono", text: planned.command }));
    $("#plan-cost").textContent = costText(cost);
    $("#plan-cost").className = "plan-cost" + (cost.needs_confirmation ? " warning" : "");
  }

  async function plan() {
    const serial = ++planSerial;
    let body;
    try { body = buildRequest(); } catch (err) {
      clear($("#plan-list"));
      $("#plan-cost").textContent = "";
      showError($("#plan-error"), err.message);
      return null;
    }
    const slow = setTimeout(() => { $("#plan-cost").textContent = "Checking the folder and measuring the model…"; }, 600);
    try {
      const out = await api("/api/audits/estimate", { json: body });
      clearTimeout(slow);
      if (serial !== planSerial) return null;
      showError($("#plan-error"), "");
      renderPlan(out.plan, out.cost);
      return { body, ...out };
    } catch (err) {
      clearTimeout(slow);
      if (serial === planSerial) {
        clear($("#plan-list"));
        $("#plan-cost").textContent = "";
        showError($("#plan-error"), err.message);
      }
      throw err;
    }
  }

  // Above the limit, an explicit yes before the work is paid for.
  function confirmCost(cost) {
    if (!cost.needs_confirmation) return Promise.resolve(true);
    const box = $("#cost-confirm");
    $("#cost-confirm-text").textContent = `This audit is estimated at about ${fmtSeconds(cost.seconds)}` +
      (cost.seconds_max > cost.seconds * 1.05 ? ` (up to ${fmtSeconds(cost.seconds_max)})` : "") +
      ` on this machine, over the ${fmtSeconds(cost.confirm_above)} the page starts without asking. It runs in the background; you can cancel it. Start it?`;
    box.hidden = false;
    $("#cost-go").focus();
    return new Promise((resolve) => {
      const done = (answer) => { box.hidden = true; $("#cost-go").onclick = $("#cost-back").onclick = null; resolve(answer); };
      $("#cost-go").onclick = () => done(true);
      $("#cost-back").onclick = () => done(false);
    });
  }

  // -- start and follow -------------------------------------------------------------------------------

  function phaseLine(status) {
    if (status.state === "queued") return "waiting for a free worker…";
    if (status.state !== "running") return P.progressText(status, "images");
    const n = status.phase_number && status.phases_planned.length ? ` (step ${status.phase_number} of ${status.phases_planned.length})` : "";
    const parts = [`${status.phase_words}${n}`];
    if (status.total && status.unit) parts.push(`${fmtInt(status.done)} of ${fmtInt(status.total)} ${status.unit}`);
    if (status.phase_seconds_left !== null) parts.push(`about ${fmtSeconds(status.phase_seconds_left)} left in this step`);
    else if (status.phase_elapsed !== null) parts.push(`${fmtSeconds(status.phase_elapsed)} in this step`);
    if (status.seconds_left !== null) parts.push(`about ${fmtSeconds(status.seconds_left)} left in all`);
    return parts.join(" · ");
  }

  function showJob(status) {
    const box = $("#audit-job");
    box.hidden = false;
    box.dataset.state = status.state;
    $("#audit-bar").value = status.state === "done" ? 1 : status.fraction || 0;
    $("#audit-text").textContent = phaseLine(status) + (status.run_id ? ` · run ${status.run_id}` : "");
  }

  async function follow(jobId, { open = true } = {}) {
    currentJob = jobId;
    document.dispatchEvent(new CustomEvent("pellucid:job-started", { detail: { id: jobId } }));
    $("#cancel-button").hidden = false;
    $("#start-button").disabled = true;
    let listed = null;
    let lastList = 0;
    try {
      for (;;) {
        const status = await api("/api/audits/jobs/" + encodeURIComponent(jobId));
        showJob(status);
        // The run is listed as soon as it exists, and its row keeps up while it runs.
        if (status.run_id && (listed !== status.run_id || Date.now() - lastList > 2000)) {
          listed = status.run_id;
          lastList = Date.now();
          await loadRuns();
        }
        if (["done", "failed", "cancelled"].includes(status.state)) {
          if (status.state === "failed") showError($("#start-error"), status.error);
          await loadRuns();
          if (status.run_id && status.state === "done" && (open || $("#run-view").hidden)) await openRun(status.run_id);
          return status;
        }
        await new Promise((resolve) => setTimeout(resolve, 400));
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
      clearTimeout(planTimer);
      planSerial += 1;  // a plan still on its way is out of date
      const body = buildRequest();
      const planned = await api("/api/audits/estimate", { json: body });
      showError($("#plan-error"), "");
      renderPlan(planned.plan, planned.cost);
      if (!(await confirmCost(planned.cost))) return;
      const job = await api("/api/audits", { json: body });
      showJob(job);
      pendingRow(job);
      await follow(job.id);
    } catch (err) {
      showError($("#start-error"), err.message);
    }
  }

  async function cancelJob(jobId) {
    try { await api(`/api/audits/jobs/${encodeURIComponent(jobId)}/cancel`, { method: "POST" }); }
    catch (err) { runsMessage(err.message); }
  }

  // -- stored runs ------------------------------------------------------------------------------------

  function ticked() { return [...document.querySelectorAll("#runs-table input[type=checkbox]:checked")].map((c) => c.value); }

  // A run's row before the run exists: the job is queued or loading its model.
  function pendingRow(job) {
    const body = $("#runs-table tbody");
    body.prepend(el("tr", { class: "pending", dataset: { job: job.id, status: "running" } }, [
      el("td"), el("td", { class: "mono", text: "…" }), el("td", { class: "status", text: "starting" }),
      el("td", { text: $("#model-select").value }), el("td", { text: "" }), el("td", { class: "num", text: "—" }),
      el("td", { class: "num", text: "—" }), el("td", { class: "num", text: "—" }), el("td", { text: "—" }),
      el("td", { class: "actions" }, el("button", { type: "button", class: "link", text: "cancel", onclick: () => cancelJob(job.id) })),
    ]));
    $("#runs-empty").hidden = true;
  }

  function runsMessage(text, jobId = null) {
    const box = $("#runs-message");
    $("#runs-message-text").textContent = text || "";
    box.hidden = !text;
    const cancelButton = $("#runs-message-cancel");
    cancelButton.hidden = !jobId;
    cancelButton.onclick = jobId ? async () => { await cancelJob(jobId); runsMessage(`Cancelling the audit; the run stays stored as cancelled (resume or delete it from the list).`); await waitAndRefresh(); } : null;
  }

  async function waitAndRefresh() {
    for (let i = 0; i < 20; i += 1) {
      await new Promise((resolve) => setTimeout(resolve, 300));
      const data = await api("/api/audits/runs");
      if (!data.runs.some((r) => r.job)) break;
    }
    await loadRuns();
  }

  async function loadRuns() {
    showError($("#runs-error"), "");
    let data;
    try { data = await api("/api/audits/runs"); } catch (err) { showError($("#runs-error"), err.message); return; }
    lastRuns = data.runs;
    const keep = new Set(ticked());  // the list is redrawn while an audit runs: ticks stay
    const body = clear($("#runs-table tbody"));
    $("#runs-empty").hidden = data.runs.length > 0;
    for (const run of data.runs) {
      const box = el("input", { type: "checkbox", value: run.id, checked: keep.has(run.id), "aria-label": "tick run " + run.id + " to compare",
                                onchange: () => { $("#compare-button").disabled = ticked().length !== 2; } });
      const actions = el("td", { class: "actions" }, [
        el("button", { type: "button", class: "link", text: "open", onclick: () => openRun(run.id) }),
        run.job ? el("button", { type: "button", class: "link", text: "cancel", onclick: () => cancelJob(run.job) }) : null,
        run.resumable && !run.job ? el("button", { type: "button", class: "link", text: "resume", onclick: () => resumeRun(run.id) }) : null,
        el("button", { type: "button", class: "link danger", text: "delete", onclick: () => deleteRun(run) }),
      ]);
      body.append(el("tr", { dataset: { status: run.status, run: run.id } }, [
        el("td", {}, box), el("td", { class: "mono", text: run.id }), el("td", { class: "status", text: run.status }),
        el("td", { text: run.model_name }), el("td", { text: run.method }),
        el("td", { class: "num", text: `${fmtInt(run.done)}/${fmtInt(run.total)}` }),
        el("td", { class: "num", text: pct(run.accuracy) }),
        el("td", { class: "num flagged", text: run.flagged_count === null || run.flagged_count === undefined ? "—" : fmtInt(run.flagged_count) }),
        el("td", { class: "gate-" + (run.gate || "none"), text: run.gate ? run.gate.toUpperCase() : "—" }), actions,
      ]));
    }
    $("#compare-button").disabled = ticked().length !== 2;
  }

  async function resumeRun(id) {
    runsMessage("");
    try {
      const job = await api(`/api/audits/runs/${encodeURIComponent(id)}/resume`, { method: "POST" });
      showJob(job);
      await follow(job.id);
    } catch (err) { runsMessage(err.message); }
  }

  async function deleteRun(run) {
    if (!window.confirm(`Delete run ${run.id}, its results and pictures?`)) return;
    runsMessage("");
    try {
      await api(`/api/audits/runs/${encodeURIComponent(run.id)}`, { method: "DELETE" });
      if ($("#run-view").dataset.run === run.id) closeRun();
    } catch (err) {
      // Stays until dismissed: a running run is cancelled first, from here.
      runsMessage(err.message, err.status === 409 ? run.job : null);
    }
    await loadRuns();
  }

  function change(v) { return v.change === null ? "—" : (v.change >= 0 ? "+" : "") + (100 * v.change).toFixed(1) + " pt"; }

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
      if (v.object_share.first !== null || v.object_share.second !== null) rows.push([`${c}: on the annotated object`, v.object_share]);
    }
    const head = (cols) => el("thead", {}, el("tr", {}, cols.map((h) => el("th", { scope: "col", text: h }))));
    body.append(el("table", { class: "ledger" }, [
      head(["measure", "first", "second", "change"]),
      el("tbody", {}, rows.map(([name, v]) => el("tr", {}, [el("td", { text: name }), el("td", { class: "num", text: pct(v.first) }),
        el("td", { class: "num", text: pct(v.second) }), el("td", { class: "num", text: change(v) })]))),
    ]));
    // Every region's share of each class's evidence, as the measures define the regions.
    body.append(el("h3", { text: "Share of each class's evidence by region" }),
      el("p", { class: "note", text: "First → second run, and the change. A corner box is 1/4 of each side, the border band 1/16 of the shorter side, the centre box 1/2 of each side; regions overlap, so shares need not add up to 100%." }));
    const regionRows = Object.entries(diff.per_class).filter(([, v]) => !v.only_in).map(([c, v]) => el("tr", {}, [
      el("th", { scope: "row", text: c }),
      ...REGIONS.map((r) => {
        const m = v[`${r}_share`] || { first: null, second: null, change: null };
        return el("td", { class: "num", dataset: { region: r } }, [`${pct(m.first)} → ${pct(m.second)}`, el("br"), el("span", { class: "note", text: change(m) })]);
      }),
    ]));
    body.append(el("table", { class: "ledger regions", id: "compare-regions" }, [head(["class", ...REGIONS.map(regionName)]), el("tbody", {}, regionRows)]));
    const only = Object.entries(diff.per_class).filter(([, v]) => v.only_in).map(([c, v]) => `${c} (only in the ${v.only_in} run)`);
    if (only.length) body.append(el("p", { class: "note", text: "Not compared: " + only.join(", ") + "." }));
    const changed = Object.entries(diff.settings_changed);
    if (changed.length) body.append(el("p", { class: "note", text: "Settings changed: " + changed.map(([k, v]) => `${k} ${JSON.stringify(v.first)} → ${JSON.stringify(v.second)}`).join("; ") }));
    body.append(el("p", { class: "note", text: `${diff.changed_predictions.length} of ${diff.images_in_both} shared images changed their prediction.` }));
    $("#compare-view").hidden = false;
  }

  // -- one run ----------------------------------------------------------------------------------------

  function facts(list, pairs) {
    clear(list);
    for (const [k, v] of pairs) list.append(el("dt", { text: k }), el("dd", { class: typeof v === "string" && v.length > 40 ? "mono" : "", text: v }));
  }

  function classTable(s, objects) {
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

  function closeRun() {
    $("#run-view").hidden = true;
    delete $("#run-view").dataset.run;
    const url = new URL(window.location.href);
    if (url.searchParams.has("run")) {
      url.searchParams.delete("run");
      history.pushState({ run: null }, "", url.pathname + url.search);
    }
  }

  // The address bar names the open run, so a link or the back button reopens it.
  function remember(id) {
    const url = new URL(window.location.href);
    if (url.searchParams.get("run") === id) return;
    url.searchParams.set("run", id);
    history.pushState({ run: id }, "", url.pathname + url.search);
  }

  async function openRun(id, { push = true } = {}) {
    const run = await api("/api/audits/runs/" + encodeURIComponent(id));
    if (push) remember(run.id);
    document.title = `Run ${run.id} · Folder audits · Pellucid`;
    const view = $("#run-view");
    view.dataset.run = run.id;
    delete view.dataset.loaded;  // set again once every part is drawn (tests and screen readers wait for it)
    view.hidden = false;
    const s = run.summary;
    $("#run-title").textContent = `Run ${run.id} · ${run.model_name} · ${run.method}`;
    $("#run-caution").textContent = run.caution;
    $("#report-html").href = `/api/audits/runs/${encodeURIComponent(run.id)}/report.html`;
    $("#report-pdf").href = `/api/audits/runs/${encodeURIComponent(run.id)}/report.pdf`;
    showCommand(run);
    const verdict = clear($("#run-verdict"));
    for (const box of ["#discovery-box", "#injection-box", "#swap-box", "#gallery-box"]) $(box).hidden = true;
    showUnreadable(run);
    if (!s) {
      verdict.append(el("p", { class: "warning", text: `This run is ${run.status} (${run.done} of ${run.total} images stored).` +
        (run.job ? " It is running now; cancel it from the list above." : run.resumable ? " Resume it from the list above." : "") }));
      for (const id of ["#run-facts", "#class-table", "#confusion-table", "#mean-maps", "#class-flags", "#flagged"]) clear($(id));
      $("#class-note").textContent = $("#flagged-note").textContent = "";
      view.dataset.loaded = run.id;
      return;
    }
    const objects = Boolean(s.object && s.object.images);
    const gate = run.gate;
    if (gate) {
      const sha = gate.policy.sha256 ? ` (policy sha256 ${gate.policy.sha256.slice(0, 12)}…)` : "";
      verdict.append(el("p", { class: "gate-" + (gate.passed ? "pass" : "fail"), text: `Gate ${gate.passed ? "PASS" : "FAIL"} under policy “${gate.policy.name}”${sha}: ${gate.checks.filter((c) => c.status === "fail").length} of ${gate.checks.length} checks failed. Stored with the run.` }));
      verdict.append(el("ul", { class: "checks" }, gate.checks.map((c) => el("li", { class: "check-" + c.status.replace("/", ""), title: c.meaning }, [el("strong", { text: c.status.toUpperCase() + " " }), c.sentence]))));
      verdict.append(el("p", { class: "note", text: "A pass means these thresholds held on these images; whether the model may be used is for the reviewers and the domain's own rules to decide." }));
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
    // Words about "the object" only when the folder came with boxes or masks.
    $("#class-note").textContent = objects
      ? "\"On object\", the pointing game (Zhang et al. 2016; tolerance 15/224 of the input's shorter side) and energy pointing (Wang et al. 2020) use the folder's boxes or masks. Region shares count only evidence off the annotated object. A corner box is 1/4 of each side (1/16 of the image), the border band 1/16 of the shorter side."
      : "Shares of each class's positive evidence by region. A corner box is 1/4 of each side (1/16 of the image), the border band 1/16 of the shorter side. This folder has no boxes or masks, so nothing is measured against an annotated region.";
    classTable(s, objects);
    confusion(s);
    const flags = clear($("#class-flags"));
    if (!s.class_flags.length) flags.append(el("li", { class: "note", text: "No corner or border holds an outsized share of any class's evidence." }));
    for (const f of s.class_flags) flags.append(el("li", { class: "warning", text: f.sentence }));

    const mm = await api(`/api/audits/runs/${encodeURIComponent(run.id)}/mean-maps`);
    const strip = clear($("#mean-maps"));
    for (const m of mm.maps) strip.append(el("figure", { class: "strip-item" }, [el("img", { src: m.png, alt: "mean evidence for " + m.class, class: "pixelated" }), el("figcaption", { text: m.class })]));
    $("#mean-colorbar").src = mm.scale.colorbar;

    const grid = clear($("#flagged"));
    $("#flagged-note").textContent = `${s.flagged_count} image(s) flagged — the count the list of runs shows — most suspect first: ` +
      (objects ? "most evidence off the annotated object, or piled up in a corner or the border band." : "evidence piled up in a corner or the border band.");
    if (run.pictures) {
      const fl = await api(`/api/audits/runs/${encodeURIComponent(run.id)}/flagged`);
      for (const f of fl.images) {
        grid.append(el("figure", { class: "flagged-item" }, [
          el("div", { class: "pair" }, [picture(f.image, "the image as the model saw it"), picture(f.overlay, "evidence overlaid")]),
          el("figcaption", {}, [el("span", { class: "mono", text: f.rel }), el("br"), `true ${f.label}, called ${f.predicted_label}`, el("br"),
            el("span", { class: "note", text: f.reasons.join("; ") })]),
        ]));
      }
    } else {
      grid.append(el("p", { class: "note", text: run.pictures_refusal }));
    }

    await showDiscovery(run, s, objects);
    showInjection(run, s);
    const sw = s.background_swap;
    $("#swap-box").hidden = !sw;
    if (sw) $("#swap-text").textContent = `${sw.tested} image(s) with ${sw.object_source}: accuracy ${pct(sw.accuracy_before)} → ${pct(sw.accuracy_after)}; ${sw.changed_predictions} prediction(s) changed when the background was replaced.`;
    if (s.gallery && run.pictures) await showGallery(run);
    view.dataset.loaded = run.id;
    view.scrollIntoView({ behavior: "smooth", block: "start" });
  }

  function showCommand(run) {
    $("#run-command").textContent = run.command || "";
    $("#run-command").hidden = !run.command;
    $("#copy-command").hidden = !run.command;
    $("#run-command-note").textContent = run.command
      ? "The exact command line that repeats this audit (the same model, images, method, tests, policy and data folder); it resumes this run while it is unfinished, and makes a new run with the same settings once it is done."
      : "This run was stored without its command (it was started before Pellucid recorded one); the settings below say everything it used.";
    $("#run-settings").textContent = `Model ${run.model_name}, sha256 ${run.model_fingerprint}\nSpec ${run.model_spec}\nDataset ${run.dataset_root}, hash ${run.dataset_hash}\nPellucid ${run.tool_version}\n\n` + JSON.stringify(run.settings, null, 2);
  }

  function showUnreadable(run) {
    const unreadable = run.unreadable || [];
    $("#unreadable-box").hidden = unreadable.length === 0;
    const ut = clear($("#unreadable-table"));
    if (unreadable.length) {
      ut.append(el("thead", {}, el("tr", {}, ["image", "stage", "reason"].map((h) => el("th", { scope: "col", text: h })))));
      ut.append(el("tbody", {}, unreadable.map((u) => el("tr", {}, [el("td", { class: "mono", text: u.rel }), el("td", { text: u.stage }), el("td", { text: u.reason })]))));
    }
  }

  function showInjection(run, s) {
    const inj = s.injection;
    $("#injection-box").hidden = !inj;
    if (!inj) return;
    $("#injection-text").textContent = `${inj.settings.patch_size.join("×")} px patch (${inj.settings.source}). ${run.injection_sentence}`;
    const t = clear($("#injection-table"));
    t.append(el("thead", {}, el("tr", {}, ["class", "other-class images", "skipped (already carry it)", "tested", "eligible", "flips", "flip rate", "mean shift"].map((h) => el("th", { scope: "col", text: h })))));
    const dash = (x) => (x === undefined || x === null ? "—" : x);
    t.append(el("tbody", {}, Object.entries(inj.per_class).map(([c, v]) => el("tr", {}, [el("th", { scope: "row", text: c }), el("td", { class: "num", text: dash(v.considered) }), el("td", { class: "num", text: dash(v.skipped) }), el("td", { class: "num", text: v.tested }), el("td", { class: "num", text: v.eligible }), el("td", { class: "num", text: v.flips }), el("td", { class: "num", text: pct(v.flip_rate) }), el("td", { class: "num", text: v.mean_shift === null ? "—" : fmt(v.mean_shift) })]))));
    const ex = clear($("#injection-examples"));
    if (!run.pictures) return;
    for (const e of inj.examples) {
      const base = `/api/audits/runs/${encodeURIComponent(run.id)}/artefact?name=`;
      ex.append(el("figure", { class: "flagged-item" }, [
        el("div", { class: "pair" }, [picture(base + encodeURIComponent(`injection/example/${e.index}/before`), "before pasting"), picture(base + encodeURIComponent(`injection/example/${e.index}/after`), "after pasting")]),
        el("figcaption", {}, [el("span", { class: "mono", text: e.rel }), el("br"), `${e.before} → ${e.after}; p ${fmt(e.p_suspect_before, 2)} → ${fmt(e.p_suspect_after, 2)}`]),
      ]));
    }
  }

  async function showGallery(run) {
    $("#gallery-box").hidden = false;
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

  async function showDiscovery(run, s, objects) {
    $("#discovery-box").hidden = !s.discovery;
    if (!s.discovery) return;
    $("#discovery-note").textContent = "Each class's maps are clustered (spectral relevance analysis, Lapuschkin et al. 2019); a cluster whose evidence sits in a small spot" +
      (objects ? " or off the annotated object" : "") + " ranks first. The most suspicious ones are then tested: taking their evidence region away from their own images, and putting it into the other classes' images.";
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

  // -- the folder browser: sub-folders of the --images folder, confined by the server ----------------

  async function browse(path) {
    showError($("#folder-error"), "");
    let listing;
    try { listing = await api(`/api/folder?folders_only=true&path=${encodeURIComponent(path)}`); }
    catch (err) { showError($("#folder-error"), err.message); return; }
    folderHere = listing.path;
    $("#folder-here").textContent = `${listing.root_name}/${listing.path}`;
    $("#folder-up").disabled = listing.parent === null;
    $("#folder-up").onclick = () => browse(listing.parent || "");
    const list = clear($("#folder-list"));
    const folders = listing.entries.filter((e) => e.kind === "folder");
    $("#folder-empty").hidden = folders.length > 0;
    for (const f of folders) {
      list.append(el("li", {}, el("button", { type: "button", class: "link folder", text: f.name + "/", "aria-label": `open the folder ${f.name}`, onclick: () => browse(f.path) })));
    }
    if (listing.truncated) list.append(el("li", { class: "note", text: "(more folders than listed; type the path instead)" }));
  }

  function toggleBrowser(open) {
    $("#folder-browser").hidden = !open;
    $("#folder-browse").setAttribute("aria-expanded", String(open));
    if (open) browse($("#folder-path").value.trim() || folderHere);
  }

  // -- small form reactions ---------------------------------------------------------------------------

  function sourceChanged() {
    const demo = $("#source-kind").value === "demo";
    $("#demo-options").hidden = !demo;
    $("#folder-options").hidden = demo;
    if (demo) toggleBrowser(false);
    schedulePlan();
  }

  function injectChanged() {
    const kind = $("#inject-kind").value;
    $("#inject-options").hidden = !kind || kind === "policy";
    $("#inject-crop").hidden = kind !== "crop";
    $("#inject-upload").hidden = kind !== "upload";
    if (kind === "upload") refreshPatches();
    schedulePlan();
  }

  async function refreshPatches() {
    try { await AuditPolicy.showPatches($("#patch-choices"), "audit-patch", chosenPatch, (id) => { chosenPatch = id; schedulePlan(); }); }
    catch (err) { showError($("#patch-error"), err.message); }
  }

  async function patchUploaded() {
    const file = $("#inject-file").files[0];
    if (!file) return;
    showError($("#patch-error"), "");
    try {
      chosenPatch = (await AuditPolicy.uploadPatch(file)).id;
      await refreshPatches();
      schedulePlan();
    } catch (err) { showError($("#patch-error"), err.message); }
    $("#inject-file").value = "";
  }

  async function openFromAddress() {
    const wanted = new URLSearchParams(window.location.search).get("run");
    if (wanted) await openRun(wanted, { push: false }).catch((err) => showError($("#runs-error"), err.message));
    else $("#run-view").hidden = true;
  }

  document.addEventListener("DOMContentLoaded", async () => {
    $("#audit-form").addEventListener("submit", start);
    $("#audit-form").addEventListener("change", (e) => { if (!e.target.closest("#folder-browser")) schedulePlan(); });
    $("#audit-form").addEventListener("input", (e) => { if (e.target.matches("input[type=text], input[type=number]")) schedulePlan(); });
    $("#cancel-button").addEventListener("click", () => currentJob && cancelJob(currentJob));
    $("#refresh-runs").addEventListener("click", loadRuns);
    $("#compare-button").addEventListener("click", () => compare().catch((err) => showError($("#runs-error"), err.message)));
    $("#runs-message-close").addEventListener("click", () => runsMessage(""));
    $("#source-kind").addEventListener("change", sourceChanged);
    $("#policy-select").addEventListener("change", policyChanged);
    $("#policy-edit").addEventListener("click", () => AuditPolicy.open($("#policy-select").value || undefined));
    $("#inject-kind").addEventListener("change", injectChanged);
    $("#inject-file").addEventListener("change", patchUploaded);
    $("#model-select").addEventListener("change", () => modelChanged().catch(() => {}));
    $("#method-select").addEventListener("change", () => { $("#method-select").dataset.touched = "1"; methodChanged(); });
    $("#method-params").addEventListener("input", () => { $("#method-params").dataset.touched = "1"; });
    $("#folder-browse").addEventListener("click", () => toggleBrowser($("#folder-browser").hidden));
    $("#folder-close").addEventListener("click", () => toggleBrowser(false));
    $("#folder-use").addEventListener("click", () => { $("#folder-path").value = folderHere; toggleBrowser(false); schedulePlan(); $("#folder-path").focus(); });
    $("#copy-command").addEventListener("click", async () => {
      try { await navigator.clipboard.writeText($("#run-command").textContent); $("#copy-command").textContent = "Copied"; }
      catch (_) { window.getSelection().selectAllChildren($("#run-command")); $("#copy-command").textContent = "Selected: copy with Ctrl+C"; }
      setTimeout(() => { $("#copy-command").textContent = "Copy the command"; }, 2500);
    });
    window.addEventListener("popstate", () => openFromAddress());
    sourceChanged();
    injectChanged();
    try { await loadOptions(); } catch (err) { showError($("#start-error"), err.message); }
    await loadRuns();
    await openFromAddress();
    schedulePlan();
    // After a reload, an audit this server is still running is followed again.
    const running = lastRuns.find((r) => r.job);
    if (running && !currentJob) follow(running.job, { open: false }).catch((err) => showError($("#start-error"), err.message));
  });
})();
