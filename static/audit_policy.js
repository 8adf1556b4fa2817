// Audit policies and suspect patches on the audits page: the policy editor (load, check, save,
// download) and the patch pickers. Every check is the server's: the page only collects the form.
"use strict";

const AuditPolicy = (() => {
  const { api, el, $, clear, showError, fillSelect } = P;
  let keys = null;          // GET /api/audits/options → policy_keys
  let onSaved = () => {};
  let editorPatch = null;   // the patch id the editor's [injection] uses

  // -- patches: stored in the data folder, picked by id -----------------------------------------

  async function fileAsDataUrl(file) {
    return new Promise((resolve, reject) => {
      const reader = new FileReader();
      reader.onload = () => resolve(reader.result);
      reader.onerror = () => reject(new Error(`could not read the file ${file.name}`));
      reader.readAsDataURL(file);
    });
  }

  async function uploadPatch(file) {
    return api("/api/audits/patches", { json: { png: await fileAsDataUrl(file), name: file.name } });
  }

  // A radio group of stored patches (thumbnail, size, id); `chosen` is selected, `onPick(id)` on change.
  async function showPatches(container, group, chosen, onPick) {
    const { patches } = await api("/api/audits/patches");
    clear(container);
    if (!patches.length) container.append(el("p", { class: "note", text: "No stored patches yet: upload one." }));
    for (const p of patches) {
      const id = `${group}-${p.id}`;
      const input = el("input", { type: "radio", name: group, id, value: p.id, checked: p.id === chosen,
                                  onchange: () => onPick(p.id) });
      container.append(el("label", { for: id, class: "patch-choice" }, [
        input, el("img", { src: p.png, alt: `stored patch ${p.id}`, class: "pixelated" }),
        el("span", { class: "note", text: `${p.width}×${p.height} px` }), el("span", { class: "mono", text: p.id.slice(0, 8) }),
      ]));
    }
  }

  // -- the editor ---------------------------------------------------------------------------------

  const num = (text) => {
    const t = String(text).trim();
    if (t === "") return null;
    const n = Number(t);
    return Number.isNaN(n) ? t : n;  // text goes to the server as is, whose parser names the problem
  };

  function thresholdRows() {
    const body = clear($("#threshold-table tbody"));
    for (const k of keys.thresholds) {
      const id = "limit-" + k.key;
      body.append(el("tr", {}, [
        el("th", { scope: "row" }, el("label", { for: id, class: "mono", text: k.key })),
        el("td", { text: k.scope === "run" ? "run" : "each class" }),
        el("td", {}, [el("span", { class: "cmp", text: k.comparison === ">=" ? "≥ " : "≤ " }),
          el("input", { type: "text", id, size: 6, dataset: { key: k.key }, inputmode: "decimal", "aria-describedby": id + "-meaning" })]),
        el("td", { class: "note", text: k.unit }),
        el("td", { id: id + "-meaning", text: k.meaning }),
      ]));
    }
    fillSelect($("#override-key"), keys.thresholds.filter((k) => k.scope === "class").map((k) => k.key));
    const meanings = (list, box) => {
      clear(box);
      for (const k of list) box.append(el("dt", { class: "mono", text: k.key }), el("dd", { text: k.meaning }));
    };
    meanings(keys.injection, $("#inject-meanings"));
    meanings(keys.audit, $("#audit-meanings"));
  }

  function overrideRow(label, key, value) {
    const row = el("tr", { dataset: { label, key } }, [
      el("td", { text: label }), el("td", { class: "mono", text: key }),
      el("td", {}, el("input", { type: "text", size: 6, value: String(value), "aria-label": `${key} for ${label}` })),
      el("td", {}, el("button", { type: "button", class: "link danger", text: "remove", onclick: () => row.remove() })),
    ]);
    $("#override-table tbody").append(row);
  }

  function paramsText(params) {
    return Object.entries(params || {}).map(([k, v]) => `${k}=${v}`).join(", ");
  }

  function readParams(text) {
    const out = {};
    for (const part of text.split(",").map((s) => s.trim()).filter(Boolean)) {
      const [k, ...rest] = part.split("=");
      const v = rest.join("=").trim();
      out[k.trim()] = v === "true" ? true : v === "false" ? false : num(v);
    }
    return out;
  }

  function fill(form) {
    $("#policy-name").value = form.name || "";
    $("#policy-description").value = form.description || "";
    for (const input of document.querySelectorAll("#threshold-table input")) {
      const v = (form.thresholds || {})[input.dataset.key];
      input.value = v === undefined || v === null ? "" : String(v);
    }
    clear($("#override-table tbody"));
    for (const [label, table] of Object.entries(form.classes || {})) {
      for (const [key, value] of Object.entries(table)) overrideRow(label, key, value);
    }
    const inj = form.injection;
    $("#policy-inject-on").checked = Boolean(inj);
    $("#policy-inject").hidden = !inj;
    editorPatch = inj ? inj.patch_id : null;
    $("#policy-inject-class").value = inj ? inj.suspect_class : "";
    $("#policy-inject-at").value = inj ? (inj.at === "random" ? "random" : inj.at.join(",")) : "";
    $("#policy-inject-seed").value = inj && inj.seed !== null && inj.seed !== undefined ? String(inj.seed) : "";
    $("#policy-inject-limit").value = inj && inj.limit ? String(inj.limit) : "";
    const audit = form.audit || {};
    $("#policy-method").value = audit.method || "";
    $("#policy-params").value = paramsText(audit.params);
    $("#policy-target").value = audit.target || "";
    refreshPatches();
  }

  // The form as the server's PolicyForm (values the parser will judge).
  function read() {
    const thresholds = {};
    for (const input of document.querySelectorAll("#threshold-table input")) {
      const v = num(input.value);
      if (v !== null) thresholds[input.dataset.key] = v;
    }
    const classes = {};
    for (const row of document.querySelectorAll("#override-table tbody tr")) {
      const v = num(row.querySelector("input").value);
      if (v === null) continue;
      (classes[row.dataset.label] = classes[row.dataset.label] || {})[row.dataset.key] = v;
    }
    let injection = null;
    if ($("#policy-inject-on").checked) {
      const at = $("#policy-inject-at").value.trim();
      injection = {
        patch_id: editorPatch, suspect_class: $("#policy-inject-class").value.trim() || null,
        at: at === "random" ? "random" : at === "" ? null : at.split(",").map((s) => num(s)),
        seed: num($("#policy-inject-seed").value), limit: num($("#policy-inject-limit").value),
      };
    }
    const params = readParams($("#policy-params").value);
    const audit = { method: $("#policy-method").value || null, params, target: $("#policy-target").value || null };
    return {
      name: $("#policy-name").value.trim() || null, description: $("#policy-description").value.trim(),
      thresholds, classes, injection,
      audit: audit.method || audit.target || Object.keys(params).length ? audit : null,
    };
  }

  function say(text) {
    const box = $("#policy-message");
    box.textContent = text;
    box.hidden = !text;
  }

  async function check() {
    showError($("#policy-error"), "");
    say("");
    try {
      const out = await api("/api/audits/policies/check", { json: read() });
      $("#policy-toml").textContent = out.toml;
      return out;
    } catch (err) {
      showError($("#policy-error"), err.message);
      return null;
    }
  }

  async function save() {
    const name = $("#policy-file-name").value.trim();
    showError($("#policy-error"), "");
    say("");
    if (!name) { showError($("#policy-error"), "Give the policy a file name to save it under (letters, digits, - or _)."); return; }
    try {
      const out = await api("/api/audits/policies/" + encodeURIComponent(name), { method: "PUT", json: read() });
      $("#policy-toml").textContent = await (await fetch(`/api/audits/policies/${encodeURIComponent(name)}/download`)).text();
      await onSaved(name);  // the gate's list holds the new policy before the message says so
      say(`Saved as ${out.path} (sha256 ${out.sha256.slice(0, 12)}…); chosen as this audit's policy.`);
    } catch (err) {
      showError($("#policy-error"), err.message);
    }
  }

  async function download() {
    const out = await check();
    if (!out) return;
    const fileName = ($("#policy-file-name").value.trim() || "policy") + ".toml";
    const url = URL.createObjectURL(new Blob([out.toml], { type: "application/toml" }));
    const a = el("a", { href: url, download: fileName, hidden: true });
    document.body.append(a);
    a.click();
    a.remove();
    setTimeout(() => URL.revokeObjectURL(url), 10_000);
    say(`Downloaded ${fileName}: give it to pellucid audit --policy ${fileName}.`);
  }

  async function load() {
    const name = $("#policy-source").value;
    showError($("#policy-error"), "");
    say("");
    if (!name) { fill({ thresholds: {}, classes: {} }); $("#policy-toml").textContent = ""; return; }
    try {
      const out = await api("/api/audits/policies/" + encodeURIComponent(name));
      fill(out.form);
      $("#policy-file-name").value = out.origin === "saved" ? out.name : "";
      say(out.origin === "bundled" ? `Loaded the bundled policy ${name}; save it under a new name to keep your changes.` : `Loaded ${name}.`);
      await check();
    } catch (err) {
      showError($("#policy-error"), err.message);
    }
  }

  async function refreshPatches() {
    if (!$("#policy-inject-on").checked) return;
    try { await showPatches($("#policy-patch-choices"), "policy-patch", editorPatch, (id) => { editorPatch = id; }); }
    catch (err) { showError($("#policy-error"), err.message); }
  }

  async function remove() {
    const name = $("#policy-source").value;
    if (!name || !window.confirm(`Delete the saved policy ${name} (policies/${name}.toml)? Runs judged by it keep their verdict.`)) return;
    showError($("#policy-error"), "");
    try {
      await api("/api/audits/policies/" + encodeURIComponent(name), { method: "DELETE" });
      say(`Deleted ${name}.`);
      await onSaved("");
    } catch (err) { showError($("#policy-error"), err.message); }
  }

  function sourceChanged() {
    const chosen = policyList.find((p) => p.name === $("#policy-source").value);
    $("#policy-delete").hidden = !(chosen && chosen.origin === "saved");
  }

  let policyList = [];

  function setPolicies(policies) {
    policyList = policies;
    const select = $("#policy-source");
    const kept = select.value;
    clear(select).append(el("option", { value: "", text: "an empty policy" }));
    for (const p of policies) select.append(el("option", { value: p.name, text: `${p.name} (${p.origin})` }));
    select.value = policies.some((p) => p.name === kept) ? kept : "";
    sourceChanged();
  }

  function open(name) {
    const box = $("#policy-editor");
    box.hidden = false;
    if (name !== undefined) { $("#policy-source").value = name; sourceChanged(); load(); }
    box.scrollIntoView({ behavior: "smooth", block: "start" });
    $("#policy-source").focus();
  }

  function init(options, methods, hooks) {
    keys = options.policy_keys;
    onSaved = hooks.onSaved;
    thresholdRows();
    fillSelect($("#policy-method"), [["", "not set"], ...methods.map((m) => [m.name, m.title])], "");
    setPolicies(options.policies);
    $("#policy-load").addEventListener("click", load);
    $("#policy-delete").addEventListener("click", remove);
    $("#policy-source").addEventListener("change", sourceChanged);
    $("#policy-check").addEventListener("click", async () => { if (await check()) say("The policy is valid; the file below is what will be written."); });
    $("#policy-save").addEventListener("click", save);
    $("#policy-download").addEventListener("click", download);
    $("#policy-close").addEventListener("click", () => { $("#policy-editor").hidden = true; $("#policy-edit").focus(); });
    $("#policy-inject-on").addEventListener("change", () => { $("#policy-inject").hidden = !$("#policy-inject-on").checked; refreshPatches(); });
    $("#override-add").addEventListener("click", () => {
      const label = $("#override-class").value.trim();
      if (!label) { showError($("#policy-error"), "Name the class the override is for."); return; }
      overrideRow(label, $("#override-key").value, $("#override-value").value.trim());
      $("#override-class").value = $("#override-value").value = "";
    });
    $("#policy-patch-file").addEventListener("change", async () => {
      const file = $("#policy-patch-file").files[0];
      if (!file) return;
      showError($("#policy-error"), "");
      try { editorPatch = (await uploadPatch(file)).id; await refreshPatches(); say(`Patch ${file.name} stored.`); }
      catch (err) { showError($("#policy-error"), err.message); }
      $("#policy-patch-file").value = "";
    });
  }

  return { init, open, setPolicies, showPatches, uploadPatch };
})();
