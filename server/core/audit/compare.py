"""Compare two stored audit runs: what differed in their inputs, measures and predictions."""

from __future__ import annotations

from typing import Any

from pellucid.core.audit.policy import failed_first, gate_of
from pellucid.core.audit.store import Store
from pellucid.core.errors import BadParameterError

__all__ = ["compare_runs"]


def _flat(prefix: str, value: Any, out: dict[str, Any]) -> None:
    if isinstance(value, dict):
        for k, v in value.items():
            _flat(f"{prefix}.{k}" if prefix else str(k), v, out)
    else:
        out[prefix] = value


def _counts(inj: dict | None) -> dict | None:
    if not inj:
        return None
    return {k: inj.get(k) for k in ("considered", "skipped", "tested", "eligible", "flips")}


def _delta(a: float | None, b: float | None) -> float | None:
    return None if a is None or b is None else float(b) - float(a)


def _gate(run: Any) -> dict | None:
    """The stored verdict in brief: pass/fail, the policy, and the failed checks' sentences."""
    gate = gate_of(run)
    if not gate:
        return None
    policy = gate.get("policy") or {}
    return {"passed": bool(gate.get("passed")), "policy": policy.get("name"), "policy_sha256": policy.get("sha256"),
            "checks": len(gate.get("checks") or []),
            "failed": [c["sentence"] for c in failed_first(gate.get("checks") or []) if c.get("status") == "fail"]}


def compare_runs(store: Store, first: str, second: str) -> dict:
    """Differences from run ``first`` to run ``second`` (``second − first`` for every number)."""
    a, b = store.get_run(first), store.get_run(second)
    if a.id == b.id:
        raise BadParameterError(f"both arguments name run {a.id}; give two different runs to compare")
    sa, sb = a.summary or {}, b.summary or {}
    fa, fb = {}, {}
    _flat("", a.settings, fa)
    _flat("", b.settings, fb)
    settings = {k: {"first": fa.get(k), "second": fb.get(k)} for k in sorted(set(fa) | set(fb))
                if fa.get(k) != fb.get(k)}
    classes = sorted(set(sa.get("per_class", {})) | set(sb.get("per_class", {})))
    per_class: dict[str, dict] = {}
    for c in classes:
        ca, cb = sa.get("per_class", {}).get(c), sb.get("per_class", {}).get(c)
        if not ca or not cb:
            per_class[c] = {"only_in": "first" if ca else "second"}
            continue
        entry: dict[str, Any] = {}
        for key in ("accuracy", "object_share", "pointing_accuracy", "energy_pointing"):
            entry[key] = {"first": ca.get(key), "second": cb.get(key), "change": _delta(ca.get(key), cb.get(key))}
        for region in ca["regions"]:
            va, vb = ca["regions"][region]["mean_share"], cb["regions"][region]["mean_share"]
            entry[f"{region}_share"] = {"first": va, "second": vb, "change": _delta(va, vb)}
        per_class[c] = entry
    ra = {r.sha256: r for r in store.results(a.id) if r.status == "done"}
    rb = {r.sha256: r for r in store.results(b.id) if r.status == "done"}
    common = sorted(set(ra) & set(rb), key=lambda s: (ra[s].item, ra[s].rel))
    changed = [
        {"rel": rb[s].rel, "label": rb[s].label, "first": ra[s].data["predicted_label"],
         "second": rb[s].data["predicted_label"]}
        for s in common if ra[s].data["predicted"] != rb[s].data["predicted"]
    ]
    ia, ib = sa.get("injection"), sb.get("injection")
    return {
        "gate": {"first": _gate(a), "second": _gate(b)},
        "first": a.to_dict(with_summary=False),
        "second": b.to_dict(with_summary=False),
        "same_model": a.model_fingerprint == b.model_fingerprint,
        "same_dataset": a.dataset_hash == b.dataset_hash,
        "settings_changed": settings,
        "accuracy": {"first": sa.get("accuracy"), "second": sb.get("accuracy"),
                     "change": _delta(sa.get("accuracy"), sb.get("accuracy"))},
        "flagged_fraction": {"first": sa.get("flagged_fraction"), "second": sb.get("flagged_fraction"),
                             "change": _delta(sa.get("flagged_fraction"), sb.get("flagged_fraction"))},
        "class_flags": {"first": [f"{f['class']}:{f['region']}" for f in sa.get("class_flags", [])],
                        "second": [f"{f['class']}:{f['region']}" for f in sb.get("class_flags", [])]},
        "injection_counts": {"first": _counts(ia), "second": _counts(ib)},
        "injection_flip_rate": {"first": ia.get("flip_rate") if ia else None,
                                "second": ib.get("flip_rate") if ib else None,
                                "change": _delta(ia.get("flip_rate") if ia else None,
                                                 ib.get("flip_rate") if ib else None)},
        "per_class": per_class,
        "images_in_both": len(common),
        "changed_predictions": changed,
    }
