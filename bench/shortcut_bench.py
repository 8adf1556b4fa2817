"""Planted-signal benchmark: does the default audit tell shortcut models from their clean twins?

The protocol of Adebayo et al., "Post hoc explanations may be ineffective for detecting unknown
spurious correlation", ICLR 2022, in the invented tile scenario (``pellucid.demo.planted``): five
kinds of signal tied to ``crack`` in training (a fixed corner tag, a tinted border frame, a glaze
tint, a stamp at a random place, a faint stripe watermark). For each kind a *shortcut* model
(signal on 90% of cracks, 5% of other tiles) and a *clean twin* (signal on half of every class)
are audited on the same held-out folder, drawn like the shortcut model's training data, with the
default audit (Grad-CAM, discovery, confirmation) and a policy that sets only a threshold the
models all meet, so the gate's verdict rests on the default ``max_confirmed_shortcuts = 0``.

- **detected**: the gate fails on the shortcut model with a confirmed cluster of ``crack``;
- **false alarm**: the gate fails on the clean twin because of any confirmed cluster.

The ground truth that a model does lean on its signal is measured apart (``reliance``: tiles of
other classes called ``crack`` once the signal is planted on them), in each model's metrics.json.

    pellucid bench shortcuts [-- --kinds corner_tag,glaze_tint] [--per-class 30] [--method occlusion]
                             [--rebuild] [--models DIR] [--out bench/results/shortcuts.md]
"""

from __future__ import annotations

import argparse
import json
import tempfile
import time
from pathlib import Path

from pellucid.core.audit import load_dataset, run_audit
from pellucid.core.audit.policy import evaluate_policy, parse_policy
from pellucid.core.audit.settings import AuditSettings
from pellucid.core.audit.store import Store
from pellucid.core.model.loading import load_model
from pellucid.core.model.spec import ModelSpec
from pellucid.demo.planted import (
    KINDS,
    SHORTCUT_CLASS,
    VARIANTS,
    build_planted_model,
    make_planted_split,
    write_planted_folder,
)

REPO = Path(__file__).resolve().parents[1]
MODELS = REPO / "bench" / "models" / "planted"
# Only a threshold every benchmark model meets, so the verdict is the default confirmed-shortcut check's.
POLICY = {"name": "benchmark gate (thresholds only)", "thresholds": {"min_accuracy": 0.0}}
AUDIT_SEED = 1


def model_dir(root: Path, kind: str, variant: str) -> Path:
    return root / f"{kind}-{variant}"


def audit_one(kind: str, variant: str, *, folder: Path, models: Path, store: Store,
              settings: AuditSettings) -> dict:
    """Audit one planted model on ``folder``; returns the verdict and the numbers behind it."""
    spec = ModelSpec.from_toml(model_dir(models, kind, variant) / "spec.toml")
    model = load_model(spec)
    dataset = load_dataset(folder)
    start = time.perf_counter()
    outcome = run_audit(model, dataset, store=store, settings=settings, resume=False)
    seconds = time.perf_counter() - start
    summary = outcome.summary
    gate = evaluate_policy(parse_policy(POLICY), summary, labels=model.labels)
    conf = summary.get("confirmation") or {}
    confirmed = conf.get("confirmed_clusters", [])
    tested = conf.get("tested", [])
    ours = [t for t in tested if t.get("class") == SHORTCUT_CLASS and t.get("removal")]
    best = next((t for t in ours if t.get("confirmed")), ours[0] if ours else None)
    return {
        "kind": kind, "variant": variant, "images": summary["done"], "accuracy": summary["accuracy"],
        "gate_passed": gate.passed, "confirmed": confirmed,
        "confirmed_shortcut_class": any(c.split("/", 1)[0] == SHORTCUT_CLASS for c in confirmed),
        "tested": [t["cluster"] for t in tested],
        "crack_test": None if best is None else {
            "cluster": best["cluster"], "region": best["region"]["kind"],
            "calls_lost": best["removal"]["calls_lost_share"],
            "net_flips": (best["transplant"] or {}).get("net_flip_rate"), "verdict": best["verdict"]},
        "clusters": sum(len(c["clusters"]) for c in (summary.get("discovery") or {}).get("classes", [])),
        "seconds": seconds,
    }


def _fmt(v: float | None) -> str:
    return "—" if v is None else f"{100 * v:.0f}%"


def table(rows: list[dict], reliance: dict) -> str:
    lines = ["| kind | model | reliance (other tiles called crack with / without the signal) | crack cluster tested "
             "| calls lost | net flips | confirmed clusters | gate | outcome |",
             "|---|---|---|---|---:|---:|---|---|---|"]
    for r in rows:
        rel = reliance.get((r["kind"], r["variant"])) or {}
        t = r["crack_test"] or {}
        if r["variant"] == "shortcut":
            outcome = "detected" if (not r["gate_passed"] and r["confirmed_shortcut_class"]) else "missed"
        else:
            outcome = "false alarm" if not r["gate_passed"] else "passed"
        lines.append(
            f"| {KINDS[r['kind']].title} | {r['variant']} | {_fmt(rel.get('called_crack_with_signal'))} / "
            f"{_fmt(rel.get('called_crack_without_signal'))} | {t.get('cluster', '—')} ({t.get('region', '—')}) | "
            f"{_fmt(t.get('calls_lost'))} | {_fmt(t.get('net_flips'))} | {', '.join(r['confirmed']) or '—'} | "
            f"{'PASS' if r['gate_passed'] else 'FAIL'} | {outcome} |")
    return "\n".join(lines)


def score(rows: list[dict]) -> dict:
    shortcut = [r for r in rows if r["variant"] == "shortcut"]
    clean = [r for r in rows if r["variant"] == "clean"]
    detected = [r["kind"] for r in shortcut if not r["gate_passed"] and r["confirmed_shortcut_class"]]
    alarms = [r["kind"] for r in clean if not r["gate_passed"]]
    return {"detected": detected, "false_alarms": alarms,
            "detection_rate": len(detected) / len(shortcut) if shortcut else None,
            "false_alarm_rate": len(alarms) / len(clean) if clean else None}


def run(kinds: list[str], *, per_class: int, models: Path = MODELS, method: str | None = None,
        work: Path | None = None, progress=print) -> tuple[list[dict], dict]:
    """Audit the shortcut model and the clean twin of every kind; returns (rows, score)."""
    settings = AuditSettings(method=method) if method else AuditSettings()
    rows = []
    with tempfile.TemporaryDirectory(prefix="pellucid-shortcuts-") as tmp:
        root = work or Path(tmp)
        with Store(root / "store") as store:
            for kind in kinds:
                folder = root / "folders" / kind
                if not (folder / "manifest.csv").is_file():
                    write_planted_folder(make_planted_split(kind, split="audit", per_class=per_class,
                                                            seed=AUDIT_SEED), folder)
                for variant in VARIANTS:
                    row = audit_one(kind, variant, folder=folder, models=models, store=store, settings=settings)
                    rows.append(row)
                    progress(f"{kind:13s} {variant:8s} gate {'PASS' if row['gate_passed'] else 'FAIL'}  confirmed: "
                             f"{', '.join(row['confirmed']) or '-'}  ({row['seconds']:.0f} s)")
    return rows, score(rows)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="pellucid bench shortcuts", description=__doc__.splitlines()[0])
    parser.add_argument("--kinds", default=",".join(KINDS), help=f"comma-separated, of: {', '.join(KINDS)}")
    parser.add_argument("--per-class", type=int, default=30, help="audit folder tiles per class (default 30)")
    parser.add_argument("--method", default=None, help="audit with this method instead of the default")
    parser.add_argument("--models", type=Path, default=MODELS, help="folder of the planted models")
    parser.add_argument("--rebuild", action="store_true", help="retrain the ten models into --models first")
    parser.add_argument("--out", type=Path, default=REPO / "bench" / "results" / "shortcuts.md")
    args = parser.parse_args(argv)
    kinds = [k.strip() for k in args.kinds.split(",") if k.strip()]
    unknown = [k for k in kinds if k not in KINDS]
    if unknown:
        parser.error(f"unknown kind(s) {', '.join(unknown)}; choose from {', '.join(KINDS)}")
    if args.rebuild:
        for kind in kinds:
            for variant in VARIANTS:
                build = build_planted_model(model_dir(args.models, kind, variant), kind=kind, variant=variant)
                print(f"trained {kind}-{variant} in {build.seconds:.0f} s")
    started = time.perf_counter()
    rows, result = run(kinds, per_class=args.per_class, models=args.models, method=args.method)
    reliance = {}
    for kind in kinds:
        for variant in VARIANTS:
            metrics = model_dir(args.models, kind, variant) / "metrics.json"
            if metrics.is_file():
                reliance[(kind, variant)] = json.loads(metrics.read_text(encoding="utf-8")).get("reliance")
    text = table(rows, reliance)
    method = args.method or AuditSettings().method
    command = "pellucid bench shortcuts" + ("" if args.kinds == ",".join(KINDS) else f" -- --kinds {args.kinds}") + \
        (f" --per-class {args.per_class}" if args.per_class != 30 else "") + (f" --method {args.method}" if
                                                                              args.method else "")
    head = (f"Command: `{command}` — default audit ({method}, discovery, confirmation), {args.per_class} tiles per "
            f"class, {len(rows)} audits in {time.perf_counter() - started:.0f} s.\n\n"
            f"Detected: {len(result['detected'])} of {len(kinds)} kinds ({', '.join(result['detected']) or 'none'}); "
            f"false alarms on clean twins: {len(result['false_alarms'])} of {len(kinds)}"
            f"{' (' + ', '.join(result['false_alarms']) + ')' if result['false_alarms'] else ''}.\n\n")
    args.out.parent.mkdir(parents=True, exist_ok=True)
    args.out.write_text(head + text + "\n", encoding="utf-8")
    args.out.with_suffix(".json").write_text(json.dumps({"rows": rows, "score": result, "method": method,
                                                         "per_class": args.per_class}, indent=2) + "\n",
                                             encoding="utf-8")
    print(head + text)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
