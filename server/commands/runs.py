"""``pellucid runs``: list, show, compare and delete stored audit runs."""

from __future__ import annotations

import argparse
import json
import time
from pathlib import Path


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("runs", help="list, show, compare or delete stored audit runs",
                       description="Stored audit runs live in the data folder (--store, $PELLUCID_DATA or "
                                   "./.pellucid). Run ids may be shortened to any unique prefix.")
    actions = p.add_subparsers(dest="runs_command", metavar="ACTION", parser_class=type(p))
    ls = actions.add_parser("list", help="one line per run, newest first")
    ls.add_argument("--json", action="store_true", help="print JSON instead of a table")
    _store_option(ls)
    ls.set_defaults(func=_list)
    show = actions.add_parser("show", help="a run's settings, status and summary")
    show.add_argument("run", help="run id (or a unique prefix)")
    show.add_argument("--json", action="store_true", help="print the whole stored record as JSON")
    _store_option(show)
    show.set_defaults(func=_show)
    cmp = actions.add_parser("compare", help="what changed from one run to another")
    cmp.add_argument("first")
    cmp.add_argument("second")
    cmp.add_argument("--json", action="store_true", help="print JSON")
    _store_option(cmp)
    cmp.set_defaults(func=_compare)
    rm = actions.add_parser("delete", help="delete a run, its results and artefacts no other run uses")
    rm.add_argument("run", nargs="+", help="run id(s)")
    _store_option(rm)
    rm.set_defaults(func=_delete)
    p.set_defaults(func=lambda _args: (p.print_help(), 2)[1])


def _store_option(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--store", type=Path, default=None, metavar="DIR",
                        help="data folder (default: $PELLUCID_DATA or ./.pellucid)")


def _open(args: argparse.Namespace):
    from pellucid.core.audit.store import Store, default_data_dir

    return Store(args.store or default_data_dir())


def _when(t: float | None) -> str:
    return time.strftime("%Y-%m-%d %H:%M", time.localtime(t)) if t else "—"


def _pct(v: float | None) -> str:
    return "n/a" if v is None else f"{100 * v:.1f}%"


def _list(args: argparse.Namespace) -> int:
    with _open(args) as store:
        runs = store.list_runs()
    if args.json:
        print(json.dumps([r.to_dict(with_summary=False) for r in runs], indent=2))
        return 0
    if not runs:
        print("no stored audit runs (start one with 'pellucid audit')")
        return 0
    from pellucid.core.audit.policy import gate_of

    print(f"{'run':<24} {'status':<11} {'images':>9} {'method':<12} {'model':<22} {'accuracy':>8} "
          f"{'verdict':<8} started")
    for r in runs:
        acc = _pct((r.summary or {}).get("accuracy")) if r.summary else "—"
        gate = gate_of(r)
        verdict = "—" if not gate else ("PASS" if gate.get("passed") else "FAIL")
        print(f"{r.id:<24} {r.status:<11} {f'{r.done}/{r.total}':>9} {r.method:<12} {r.model_name[:22]:<22} "
              f"{acc:>8} {verdict:<8} {_when(r.created)}")
    return 0


def _show(args: argparse.Namespace) -> int:
    with _open(args) as store:
        run = store.get_run(args.run)
    if args.json:
        print(json.dumps(run.to_dict(), indent=2))
        return 0
    s = run.summary or {}
    print(f"run {run.id}: {run.status}, {run.done}/{run.total} images, started {_when(run.created)}, "
          f"finished {_when(run.finished)}")
    print(f"model {run.model_name} (sha256 {run.model_fingerprint}), spec {run.model_spec}")
    print(f"dataset {run.dataset_root} (hash {run.dataset_hash})")
    print(f"method {run.method}, settings {json.dumps(run.settings['audit'], sort_keys=True)}")
    print(f"tool version {run.tool_version}; re-run with: {run.command or '(not recorded)'}")
    if s.get("provenance"):
        from pellucid.core.provenance import provenance_line

        print(f"environment: {provenance_line(s['provenance'])}")
    if run.error:
        print(f"error: {run.error}")
    _print_gate(run)
    if s:
        print(f"accuracy {_pct(s.get('accuracy'))}; flagged images {s.get('flagged_count')}")
        for c, v in s.get("per_class", {}).items():
            worst = max((n for n in ("top_left", "top_right", "bottom_left", "bottom_right")),
                        key=lambda n: v["regions"][n]["mean_share"] or 0.0)
            on_object = f"object share {_pct(v['object_share'])}, " if v.get("with_object") else ""
            print(f"  {c}: accuracy {_pct(v['accuracy'])}, {on_object}"
                  f"largest corner share {_pct(v['regions'][worst]['mean_share'])} ({worst})")
        for f in s.get("class_flags", []):
            print(f"flag: {f['sentence']}")
        if s.get("injection"):
            from pellucid.core.audit.sentences import injection_sentence

            print(f"injection: {injection_sentence(s['injection'])}")
    from pellucid.core.audit.sentences import unreadable_images

    for u in unreadable_images(run.dataset, run.summary):
        print(f"not used: {u['rel']} ({u['stage']}): {u['reason']}")
    return 0


def _print_gate(run) -> None:
    """The stored verdict, then every failed check (failed checks first, as stored)."""
    from pellucid.core.audit.policy import failed_first, gate_of, gate_sentence

    gate = gate_of(run)
    if not gate:
        print("gate: no policy judged this run ('pellucid report RUN --policy FILE' judges it)")
        return
    print(gate_sentence(gate))
    for check in failed_first(gate.get("checks") or []):
        if check.get("status") == "fail":
            print(f"  FAIL {check['sentence']}")


def _compare(args: argparse.Namespace) -> int:
    from pellucid.core.audit.compare import compare_runs

    with _open(args) as store:
        diff = compare_runs(store, args.first, args.second)
    if args.json:
        print(json.dumps(diff, indent=2))
        return 0
    print(f"{diff['first']['id']} → {diff['second']['id']}: same model: {diff['same_model']}, "
          f"same dataset: {diff['same_dataset']}")
    for key, change in diff["settings_changed"].items():
        print(f"  setting {key}: {change['first']!r} → {change['second']!r}")
    gate = diff["gate"]
    print(f"  verdict {_verdict(gate['first'])} → {_verdict(gate['second'])}")
    for side in ("first", "second"):
        for line in gate[side]["failed"] if gate[side] else []:
            print(f"    {side} run FAIL {line}")
    acc = diff["accuracy"]
    print(f"  accuracy {_pct(acc['first'])} → {_pct(acc['second'])}")
    inj = diff["injection_flip_rate"]
    if inj["first"] is not None or inj["second"] is not None:
        counts = diff.get("injection_counts", {})

        def of(c: dict | None) -> str:
            return "—" if not c else (f"{c.get('flips')} of {c.get('eligible')} eligible; {c.get('tested')} tested, "
                                      f"{c.get('skipped')} skipped")

        print(f"  injection flip rate {_pct(inj['first'])} → {_pct(inj['second'])} "
              f"({of(counts.get('first'))} → {of(counts.get('second'))})")
    print(f"  class flags {diff['class_flags']['first'] or 'none'} → {diff['class_flags']['second'] or 'none'}")
    print(f"  {len(diff['changed_predictions'])} of {diff['images_in_both']} shared image(s) changed prediction")
    return 0


def _verdict(gate: dict | None) -> str:
    if not gate:
        return "none (no policy)"
    sha = gate.get("policy_sha256")
    return f"{'PASS' if gate['passed'] else 'FAIL'} ({gate['policy']!r}{f', sha256 {sha[:12]}…' if sha else ''})"


def _delete(args: argparse.Namespace) -> int:
    with _open(args) as store:
        for run_id in args.run:
            run = store.get_run(run_id)
            removed = store.delete_run(run.id)
            print(f"deleted run {run.id} ({removed} artefact file(s) removed)")
    return 0
